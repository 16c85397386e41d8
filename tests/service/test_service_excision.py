"""Excision and the shift gauge through a real server on 127.0.0.1 (real workers, real zarr).

* An excision-code run (Kerr-Schild Schwarzschild, r < 1.5 M filled with NaN, the region declared
  by spheres in the spec or by an excision_mask per patch) finds the horizon: area 16 pi M^2
  (Matzner, Huq & Shoemaker, PRD 59, 024015 (1999); docs/references.md item 2).
* NaN outside the declared region is refused with INVALID_ARGUMENT naming field, patch and node.
* A Kerr-Schild shift is not a moving-puncture shift: without SHIFT_GAUGE_MOVING_PUNCTURE it gives
  no puncture track points (one warning says why); declared, the shift is integrated.
"""

from __future__ import annotations

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_server.numerics import excision as server_excision
from penumbra_server.numerics.spacetimes import SchwarzschildKerrSchild, sample_patch
from penumbra_shim import _excision as shim_excision

MASS = 1.0
EXCISION_RADIUS = 1.5  # M
SPACING = 0.1  # M; the published check of the same grid is rel 2e-5 (test_published_checks)
HALF_WIDTH = 2.8  # M
OFFSET = 0.37  # in spacings: no node on r = 0


def _kerr_schild_patch(*, nan_inside: float | None = None, mask_inside: float | None = None,
                       with_shift: bool = False) -> tuple[ps.PatchData, np.ndarray]:
    """The t = 0 Kerr-Schild slice on one box, NaN at r < ``nan_inside`` (M), optionally with an
    excision_mask marking r < ``mask_inside``; returns the patch and the nodes' radii."""
    n = int(np.ceil(2 * HALF_WIDTH / SPACING)) + 1
    origin = np.full(3, -HALF_WIDTH + OFFSET * SPACING)
    patch = sample_patch(SchwarzschildKerrSchild(mass=MASS), origin=origin, spacing=(SPACING,) * 3, shape=(n,) * 3,
                         variable_set="adm")
    x, y, z = np.meshgrid(*patch.node_coordinates(), indexing="ij")
    r = np.sqrt(x * x + y * y + z * z)
    keep = set(ps.required_fields("adm")) | ({"shift_x", "shift_y", "shift_z"} if with_shift else set())
    fields = {name: arr.copy() for name, arr in patch.fields.items() if name in keep}
    if nan_inside is not None:
        for arr in fields.values():
            arr[r < nan_inside] = np.nan
    if mask_inside is not None:
        fields[ps.EXCISION_MASK_FIELD] = (r < mask_inside).astype(float)
    return ps.PatchData(origin=tuple(origin), spacing=(SPACING,) * 3, fields=fields), r


def _spec(name: str, **extra) -> ps.RunSpec:
    # The first search scans spheres up to 2 x the approximate mass; the Kerr-Schild horizon sits
    # at r = 2 M, on that edge for the exact mass, so the approximate mass is stated 20% high.
    return ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0.0, 0.0, 0.0), 1.2 * MASS),), name=name,
                      finder=ps.FinderOptions(lmax=6), **extra)


def _events(client, run) -> list[ps.Event]:
    run.close()
    return list(client.watch(run.run_id, from_seq=1, timeout_s=600))


def test_shim_and_server_mark_the_same_excised_nodes():
    sphere = (0.3, -0.2, 0.1), 0.45
    origin, spacing, shape = np.array([-1.0, -1.0, -1.0]), np.array([0.1, 0.12, 0.15]), (21, 18, 14)
    mask = np.zeros(shape)
    mask[3, 4, 5] = 2.0
    ours = shim_excision.excised_nodes(origin, spacing, shape, [ps.ExcisedSphere(*sphere)], mask)
    theirs = server_excision.excised_node_mask(origin, spacing, shape, [server_excision.ExcisedSphere(*sphere)], mask)
    assert ps.EXCISION_MASK_FIELD == server_excision.EXCISION_MASK_FIELD
    assert ours.sum() > 10 and np.array_equal(ours, theirs)


@pytest.mark.parametrize("declared_by", ["spheres", "mask"])
def test_an_excision_run_finds_the_horizon(client, declared_by):
    if declared_by == "spheres":
        spec = _spec("excised by spheres",
                     excised_spheres=[ps.ExcisedSphere((0.0, 0.0, 0.0), EXCISION_RADIUS, body="A")])
        patch, r = _kerr_schild_patch(nan_inside=EXCISION_RADIUS)
    else:
        spec = _spec("excised by a mask")
        patch, r = _kerr_schild_patch(nan_inside=EXCISION_RADIUS, mask_inside=EXCISION_RADIUS)
    assert int((r < EXCISION_RADIUS).sum()) > 10_000
    run = client.open_run(spec, cache_results=False)
    first = ps.build_slice(time=0.0, iteration=0, variable_set="adm", patches=[patch],
                           excised_spheres=spec.excised_spheres)
    assert run.submit(first).result(60).accepted
    if declared_by == "mask":
        # The next slice excises r < 1.9 M: the horizon's stencils (down to r = 1.6 M) need
        # excised data, so it is not found, for that reason.
        wider, _ = _kerr_schild_patch(nan_inside=1.9, mask_inside=1.9)
        assert run.submit(ps.build_slice(time=0.1, iteration=1, variable_set="adm", patches=[wider])).result(60).accepted
    events = _events(client, run)
    found = [e for e in events if e.kind == "surface_found"]
    assert [e.iteration for e in found] == [0], [(e.kind, getattr(e, "reason", ""), getattr(e, "surface", None) and e.surface.message)
                                            for e in events]
    s = found[0].surface
    print(f"\nKerr-Schild, r < 1.5 M NaN, excised by {declared_by}: area / 16 pi = {s.area / (16 * np.pi):.8f}")
    # Matzner, Huq & Shoemaker, PRD 59, 024015 (1999): area 16 pi M^2; grid accuracy of h = 0.1 M.
    assert s.area == pytest.approx(16 * np.pi * MASS**2, rel=2e-5)
    assert s.irreducible_mass == pytest.approx(MASS, rel=1e-5)
    if declared_by == "mask":
        (missed,) = [e for e in events if e.kind == "surface_not_found"]
        assert missed.iteration == 1 and missed.reason == "needs_excised_data"
        assert "excised region" in missed.surface.message


def test_nan_outside_the_declared_region_is_refused_naming_the_field(client):
    spheres = [ps.ExcisedSphere((0.0, 0.0, 0.0), EXCISION_RADIUS, body="A")]
    patch, r = _kerr_schild_patch(nan_inside=EXCISION_RADIUS)
    node = (50, 28, 28)  # on the x axis at r = 2.24 M: outside the sphere, outside the horizon
    assert r[node] > EXCISION_RADIUS + 0.5
    patch.fields["K_xy"][node] = np.nan
    # The shim refuses it before sending ...
    with pytest.raises(ps.SliceValidationError, match=r"patches\[0\]\.fields\['K_xy'\]: non-finite value .*outside "
                                                      r"the declared excised regions at node \[i, j, k\] = \[50, 28, 28\]"):
        ps.build_slice(time=0.0, iteration=0, variable_set="adm", patches=[patch], excised_spheres=spheres)
    # ... and the server refuses it when the shim's check is off.
    run = client.open_run(_spec("nan outside the excision", excised_spheres=spheres), cache_results=False)
    sl = ps.build_slice(time=0.0, iteration=0, variable_set="adm", patches=[patch], check_finite=False)
    with pytest.raises(ps.PenumbraError) as info:
        run.submit(sl).result(60)
    assert info.value.code.name == "INVALID_ARGUMENT"
    assert "patches[0] field 'K_xy'" in info.value.details and "[50, 28, 28]" in info.value.details
    assert "inside no excised region" in info.value.details
    run.close()


def _puncture_points(events) -> list:
    return [e.track.puncture for e in events if e.kind == "track_updated" and e.track.puncture is not None]


def test_a_kerr_schild_shift_makes_no_puncture_track_unless_moving_puncture_is_declared(client):
    patch, _ = _kerr_schild_patch(with_shift=True)
    slices = [ps.build_slice(time=0.1 * i, iteration=i, variable_set="adm", patches=[patch]) for i in range(3)]
    outcome = {}
    for gauge in (None, "moving_puncture"):
        run = client.open_run(_spec(f"kerr-schild shift, gauge {gauge}", shift_gauge=gauge), cache_results=False)
        assert all(run.submit(sl).result(60).accepted for sl in slices)
        outcome[gauge] = _events(client, run)
    undeclared, declared = outcome[None], outcome["moving_puncture"]
    assert len([e for e in undeclared if e.kind == "surface_found"]) == 3
    assert _puncture_points(undeclared) == []
    warnings = [e for e in undeclared if e.kind == "warning"]
    assert len(warnings) == 1 and warnings[0].warning_kind == "tracking" and "moving-puncture" in warnings[0].message
    # Declared (wrongly, for this shift): the shift is integrated and the "puncture" drifts
    # inwards with -beta (beta^i = 2M / (r + 2M) n^i, outward): the gate is what keeps it out.
    points = _puncture_points(declared)
    assert len(points) == 3 and points[0].uncertainty == 0.0
    print(f"\nKerr-Schild shift integrated as if moving-puncture: drift {np.linalg.norm(points[-1].position - points[0].position):.3e} M "
          f"over {points[-1].time - points[0].time:.2f} M; undeclared: no puncture points, one warning")
    assert np.linalg.norm(points[-1].position - points[0].position) > 1e-3
    assert not [e for e in declared if e.kind == "warning"]
