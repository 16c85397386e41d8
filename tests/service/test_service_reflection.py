"""Bitant symmetry (mirror symmetry through z = 0) through the service: a run with symmetry "bitant" sends only
z >= 0 and the server mirrors each slice at ingest (odd parity for the xz and yz tensor
components and shift_z). The surfaces and quantities equal those of a run sending the full grid
on the same lattice.

Spacetimes: Kerr in Kerr-Schild form with a = 0.6, spin along z (docs/references.md item 3: area
8 pi M r_+, J = a M; item 5: Christodoulou mass M; item 6b: J from K_ij and the rotation field)
and a Brill-Lindquist pair in the plane z = 0 (docs/references.md item 7).
"""

from __future__ import annotations

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_server.numerics.spacetimes import BrillLindquist, KerrKerrSchild, sample_patch

# The flat values of the Kerr-Schild fields where f = 2 M r^3 / (r^4 + a^2 z^2) -> 0: the node
# layer z = 0 inside the ring (x^2 + y^2 < a^2) is the disc r = 0, where the sampled Kerr-Schild
# form is 0/0. Those nodes lie 1.2 M inside the horizon, far from every stencil of the surface
# (the surface's stencils reach a few nodes), so the same finite stand-in on both grids is enough.
_FLAT = {"gamma_xx": 1.0, "gamma_yy": 1.0, "gamma_zz": 1.0, "lapse": 1.0}


def _patch(spacetime, *, origin, spacing, shape, variable_set, fill_disc=False) -> ps.PatchData:
    patch = sample_patch(spacetime, origin=origin, spacing=(spacing,) * 3, shape=shape, variable_set=variable_set)
    keep = set(ps.required_fields(variable_set)) | {"shift_x", "shift_y", "shift_z"}
    fields = {}
    for name, values in patch.fields.items():
        if name not in keep:
            continue
        bad = ~np.isfinite(values)
        if bad.any():
            assert fill_disc, f"{name}: non-finite values off the ring's disc"
            # Only the disc nodes of the plane z = 0 may be singular.
            nodes = np.argwhere(bad)
            z = origin[2] + spacing * nodes[:, 2]
            rho = np.hypot(origin[0] + spacing * nodes[:, 0], origin[1] + spacing * nodes[:, 1])
            assert np.allclose(z, 0.0) and np.all(rho < spacetime.spin), name
            values = np.where(bad, _FLAT.get(name, 0.0), values)
        fields[name] = values
    return ps.PatchData(origin=origin, spacing=(spacing,) * 3, fields=fields)


def _half_and_full(spacetime, half_width, spacing, variable_set, *, fill_disc=False):
    n = int(round(2 * half_width / spacing)) + 1
    nz = (n + 1) // 2
    xy = (-half_width + 0.31 * spacing, -half_width + 0.27 * spacing)
    half = _patch(spacetime, origin=(*xy, 0.0), spacing=spacing, shape=(n, n, nz), variable_set=variable_set,
                  fill_disc=fill_disc)
    full = _patch(spacetime, origin=(*xy, -(nz - 1) * spacing), spacing=spacing, shape=(n, n, 2 * nz - 1),
                  variable_set=variable_set, fill_disc=fill_disc)
    return half, full


def _found(client, spec, patch) -> tuple[dict, ps.RunInfo]:
    run = client.open_run(spec, cache_results=False)
    ack = run.submit(ps.build_slice(time=0.0, iteration=0, variable_set=spec.variable_set, patches=[patch])).result(60)
    assert ack.accepted
    run.close()
    events = list(client.watch(run.run_id, timeout_s=600))
    return {e.surface.label: e.surface for e in events if e.kind == "surface_found"}, ack


@pytest.mark.parametrize("case", ["kerr_spin_z", "brill_lindquist_pair"])
def test_half_grid_with_reflection_gives_the_full_grid_surfaces(client, case):
    if case == "kerr_spin_z":
        spacetime = KerrKerrSchild(mass=1.0, spin=0.6, axis=np.array([0.0, 0.0, 1.0]), centre=np.zeros(3))
        half, full = _half_and_full(spacetime, 2.6, 0.1, "adm", fill_disc=True)
        bodies, variable_set = (ps.Body("K", (0.0, 0.0, 0.0), 1.0),), "adm"
    else:
        spacetime = BrillLindquist(masses=np.array([0.5, 0.5]), positions=np.array([[0.5, 0.0, 0.0], [-0.5, 0.0, 0.0]]))
        half, full = _half_and_full(spacetime, 1.3, 0.05, "conformal_w")
        bodies, variable_set = (ps.Body("A", (0.5, 0.0, 0.0), 0.5), ps.Body("B", (-0.5, 0.0, 0.0), 0.5)), "conformal_w"
    finder = ps.FinderOptions(lmax=8)
    mirrored, half_ack = _found(client, ps.RunSpec(variable_set=variable_set, bodies=bodies, finder=finder,
                                                    symmetry="bitant", name=f"{case} half"), half)
    direct, full_ack = _found(client, ps.RunSpec(variable_set=variable_set, bodies=bodies, finder=finder,
                                                  name=f"{case} full"), full)
    assert half_ack.bytes_sent < 0.52 * full_ack.bytes_sent
    assert sorted(mirrored) == sorted(direct) == sorted(b.label for b in bodies)
    worst = max(abs(mirrored[label].area - a.area) / a.area for label, a in direct.items())
    print(f"\n{case}: half grid mirrored at ingest vs full grid: largest relative area difference {worst:.1e}; "
          + "; ".join(f"{label}: A = {a.area:.6f}, J_z = {a.angular_momentum[2]:.5f}, "
                      f"M_Chr = {a.christodoulou_mass:.6f}" for label, a in sorted(direct.items())))
    for label, a in direct.items():
        b = mirrored[label]
        np.testing.assert_allclose(b.coefficients, a.coefficients, rtol=0, atol=1e-10)
        np.testing.assert_allclose(b.centroid, a.centroid, rtol=0, atol=1e-10)
        for name in ("area", "irreducible_mass", "christodoulou_mass", "spin_equatorial_circumference",
                     "spin_polar_circumference", "radius_max"):
            assert getattr(b, name) == pytest.approx(getattr(a, name), rel=1e-10), name
        np.testing.assert_allclose(b.angular_momentum, a.angular_momentum, rtol=0, atol=1e-10)
        # The mirrored surface is symmetric about z = 0 as the data are.
        assert abs(b.centroid[2]) < 1e-10
    if case == "kerr_spin_z":
        k = direct["K"]
        r_plus = spacetime.horizon_radius
        # Published checks (docs/references.md items 3, 5, 6b); grid h = 0.1 M, so loose tolerances.
        assert k.area == pytest.approx(8 * np.pi * r_plus, rel=2e-3)
        assert k.angular_momentum[2] == pytest.approx(0.6, rel=1e-2)
        assert k.christodoulou_mass == pytest.approx(1.0, rel=2e-3)


def test_a_patch_below_the_plane_is_refused_in_a_reflection_run(client):
    spacetime = BrillLindquist(masses=np.array([0.5]), positions=np.array([[0.0, 0.0, 0.0]]))
    run = client.open_run(ps.RunSpec(variable_set="conformal_w", bodies=(ps.Body("A", (0, 0, 0), 0.5),),
                                     symmetry="bitant"), cache_results=False)
    below = _patch(spacetime, origin=(-0.6, -0.6, -0.2), spacing=0.1, shape=(13, 13, 9), variable_set="conformal_w")
    ticket = run.submit(ps.build_slice(time=0.0, iteration=0, variable_set="conformal_w", patches=[below]))
    with pytest.raises(ps.PenumbraError) as info:
        ticket.result(30)
    assert info.value.code.name == "INVALID_ARGUMENT"
    assert "SYMMETRY_BITANT" in info.value.details and "< 0" in info.value.details
    run.close()
