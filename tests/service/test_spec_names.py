"""The run spec's renamed parts: archives written under the earlier names re-open unchanged, and
the symmetry choice travels both ways."""

import pytest

import penumbra_shim as ps
from penumbra_server.server._spec import RunSettings
from penumbra_server.server.errors import ServiceError
from penumbra_shim._wire import horizons_pb2 as pb


def _spec_dict(**extra) -> dict:
    settings = RunSettings.from_wire(ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0, 0, 0), 1.0),),
                                                refinement=ps.RefinementOptions(nesting_depth=3, steering_interval=2.5,
                                                                                guard_points=1)).to_wire())
    data = settings.to_dict()
    data.update(extra)
    return data


def test_an_archive_spec_with_the_earlier_names_reopens_with_the_same_policy_and_symmetry():
    data = _spec_dict()
    assert data["refinement"]["nesting_depth"] == 3 and data["symmetry"] == "none"
    earlier = _spec_dict()
    refinement = earlier["refinement"]
    refinement["levels"] = refinement.pop("nesting_depth")
    refinement["regrid_interval"] = refinement.pop("steering_interval")
    refinement["buffer_points"] = refinement.pop("guard_points")
    del earlier["symmetry"]
    earlier["reflection_z"] = True
    old = RunSettings.from_dict(earlier)
    assert old.refinement == RunSettings.from_dict(data).refinement
    assert (old.refinement.nesting_depth, old.refinement.steering_interval, old.refinement.guard_points) == (3, 2.5, 1)
    assert old.symmetry == "bitant" and old.bitant


@pytest.mark.parametrize("name, wire", [("none", pb.RunSpec.SYMMETRY_NONE), ("bitant", pb.RunSpec.SYMMETRY_BITANT)])
def test_symmetry_round_trips_and_unspecified_means_none(name, wire):
    spec = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0, 0, 0), 1.0),), symmetry=name)
    assert spec.to_wire().symmetry == wire
    settings = RunSettings.from_wire(spec.to_wire())
    assert settings.symmetry == name and settings.to_wire().symmetry == wire
    assert ps.RunSpec.from_wire(settings.to_wire()).symmetry == name
    unspecified = spec.to_wire()
    unspecified.symmetry = pb.RunSpec.SYMMETRY_UNSPECIFIED
    assert RunSettings.from_wire(unspecified).symmetry == "none"


def test_an_unknown_symmetry_is_refused_naming_the_field():
    with pytest.raises(ValueError, match="symmetry"):
        ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0, 0, 0), 1.0),), symmetry="octant")
    spec = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0, 0, 0), 1.0),)).to_wire()
    spec.symmetry = 7
    with pytest.raises(ServiceError, match=r"spec\.symmetry: unknown symmetry 7") as info:
        RunSettings.from_wire(spec)
    assert info.value.code.name == "INVALID_ARGUMENT"


def test_excised_spheres_and_shift_gauge_travel_and_bad_ones_are_refused_naming_the_field():
    spec = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0, 0, 0), 1.0),),
                      excised_spheres=[ps.ExcisedSphere((0.5, 0, 0), 0.4, body="A")], shift_gauge="moving_puncture")
    settings = RunSettings.from_wire(spec.to_wire())
    assert settings.excised_spheres[0].centre == (0.5, 0.0, 0.0) and settings.excised_spheres[0].radius == 0.4
    assert settings.tracks_punctures and RunSettings.from_dict(settings.to_dict()) == settings
    echoed = ps.RunSpec.from_wire(settings.to_wire())  # defaults filled in by the server, e.g. lmax_common
    assert (echoed.excised_spheres, echoed.shift_gauge) == (spec.excised_spheres, "moving_puncture")
    assert not RunSettings.from_wire(ps.RunSpec(variable_set="adm", bodies=spec.bodies,
                                                shift_gauge="other").to_wire()).tracks_punctures
    # Archives written before the gauge existed integrated every shift: a restarted server keeps that.
    earlier = settings.to_dict()
    del earlier["shift_gauge"], earlier["excised_spheres"]
    assert RunSettings.from_dict(earlier).shift_gauge == "moving_puncture"
    bad = spec.to_wire()
    bad.excised_spheres[0].radius_m = -1.0
    with pytest.raises(ServiceError, match=r"spec\.excised_spheres\[0\]\.radius_m: expected a radius > 0"):
        RunSettings.from_wire(bad)
    bad = spec.to_wire()
    bad.excised_spheres[0].centre_m.y = float("nan")
    with pytest.raises(ServiceError, match=r"spec\.excised_spheres\[0\]\.centre_m: expected a finite number"):
        RunSettings.from_wire(bad)
    bad = spec.to_wire()
    bad.shift_gauge = 9
    with pytest.raises(ServiceError, match=r"spec\.shift_gauge: unknown shift gauge 9"):
        RunSettings.from_wire(bad)
    with pytest.raises(ValueError, match="shift_gauge"):
        ps.RunSpec(variable_set="adm", bodies=spec.bodies, shift_gauge="puncture")
    with pytest.raises(ValueError, match="radius"):
        ps.ExcisedSphere((0, 0, 0), -0.1)
