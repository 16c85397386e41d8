"""The service's own common-horizon search (planner, scheduler, worker processes, a real server on
loopback; no hand-made seed) on Brill-Lindquist pairs with bare-mass ratios 1, 2 and 4: 1 % above
the critical separation it reports "no trapped surface here yet" (reason no candidate, not "not
converged" or "outside data"), 0.4 % below it finds the common horizon.

Data: Brill & Lindquist, Phys. Rev. 131, 471 (1963): time symmetric, conformally flat,
psi = 1 + sum_i m_i / (2 |x - x_i|). Critical separations (largest coordinate separation with a
common MOTS, units of the total bare mass M = m1 + m2): computed by the independent axisymmetric
shooting solver tests/numerics/axisymmetric_mots.py (scipy only, nothing of penumbra_server);
the equal-mass one agrees with the published d_c of about 1.53 m per bare mass, i.e. 0.766 M
(shared references item 7: Cadez, Ann. Phys. 83, 449 (1974); Bishop, GRG 14, 717 (1982); from
memory). The q = 2 constant is recomputed by test_the_cached_critical_separation_of_mass_ratio_2.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

import penumbra_shim as ps

from tracking_support import bl_patches, cube

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "numerics"))
from axisymmetric_mots import Pair, fold_gap  # noqa: E402  (the independent reference)

#: Mass ratio q = m1 / m2 -> critical separation d_c / M, computed by
#: tests/numerics/axisymmetric_mots.py (critical_separation; 5 digits).
CRITICAL_SEPARATION = {1: 0.76620, 2: 0.74663, 4: 0.69872}
#: Irreducible mass / M of the outer common MOTS at 0.996 d_c, computed by
#: tests/numerics/axisymmetric_mots.py (common_mots(...)["outer"].irreducible_mass).
OUTER_IRREDUCIBLE_MASS = {1: 0.988661, 2: 0.990575, 4: 0.994423}
BELOW, ABOVE = 1 - 0.004, 1 + 0.01
FINE_SPACING = 0.03     # about 7 points across the lighter horizon of q = 4 (m = 0.2, r ~ m / 2)


def _masses(q: int) -> tuple[float, float]:
    return q / (1 + q), 1 / (1 + q)


def _positions(q: int, d: float) -> np.ndarray:
    """Heavier body A on +x, lighter B on -x, the centre of (bare) mass at the origin."""
    m1, m2 = _masses(q)
    return np.array([[m2 * d, 0.0, 0.0], [-m1 * d, 0.0, 0.0]])


def _slice(index: int, q: int, d: float) -> ps.OutgoingSlice:
    # A fine box holding the common horizon (it reaches about 0.67 M from the origin here) under a
    # coarse one holding the search's data region.
    boxes = [cube((0.0, 0.0, 0.0), 1.6, 0.08, level=0), cube((0.0, 0.0, 0.0), 0.85, FINE_SPACING, level=1)]
    return ps.build_slice(time=0.5 * index, iteration=index, variable_set="conformal_w",
                          patches=bl_patches(boxes, _masses(q), _positions(q, d)))


@pytest.mark.slow
@pytest.mark.parametrize("q", [1, 2, 4])
def test_the_services_own_search_finds_the_common_horizon_just_below_the_critical_separation(client, q):
    d_c = CRITICAL_SEPARATION[q]
    separations = [ABOVE * d_c, ABOVE * d_c, BELOW * d_c]
    m1, m2 = _masses(q)
    start = _positions(q, separations[0])
    spec = ps.RunSpec(variable_set="conformal_w", name=f"BL q={q} across d_c",
                      bodies=(ps.Body("A", tuple(start[0]), m1), ps.Body("B", tuple(start[1]), m2)),
                      finder=ps.FinderOptions(lmax=8, tolerance=1e-8),
                      backlog=ps.BacklogOptions(queue_depth=len(separations)))
    run = client.open_run(spec, cache_results=False)
    for index, d in enumerate(separations):
        run.submit(_slice(index, q, d))
    assert run.flush(300)
    run.close()
    events = list(client.watch(run.run_id, timeout_s=300))
    reports = {(e.iteration, e.surface.label): e for e in events if e.kind in ("surface_found", "surface_not_found")}

    for i in range(len(separations)):
        assert reports[(i, "A")].kind == "surface_found" and reports[(i, "B")].kind == "surface_found", i
    assert (0, "common") not in reports  # the watch starts once both bodies have been found
    above = reports[(1, "common")]
    assert above.kind == "surface_not_found", f"a common horizon 1 % above d_c: {above.surface.message}"
    assert above.reason == "no_candidate", above.surface.message
    assert "no trapped surface here yet" in above.surface.message

    below = reports[(2, "common")]
    assert below.kind == "surface_found", f"q = {q}, d = {separations[2]:.5f} M: {below.surface.message}"
    print(f"\nq = {q}: common horizon at d = {separations[2]:.5f} M (0.4 % below d_c = {d_c} M): "
          f"M_irr = {below.surface.irreducible_mass:.6f} M, reference {OUTER_IRREDUCIBLE_MASS[q]} M; "
          f"{below.surface.message}")
    # The outer common MOTS (the inner one, also enclosing both bodies, has a larger area; near
    # the fold the two differ in M_irr by about 1e-4 relative; the grid's error is larger).
    assert below.surface.irreducible_mass == pytest.approx(OUTER_IRREDUCIBLE_MASS[q], rel=2e-3)
    formed = [e for e in events if e.kind == "common_horizon_formed"]
    assert len(formed) == 1 and formed[0].iteration == 2


@pytest.mark.slow
def test_the_cached_critical_separation_of_mass_ratio_2():
    # The fold of the common MOTSs brackets the cached constant within 3e-4 relative: common MOTSs
    # just below it (negative fold gap), none just above (axisymmetric_mots.fold_gap).
    d_c = CRITICAL_SEPARATION[2]
    m1, m2 = _masses(2)
    assert fold_gap(Pair(m1, m2, d_c * (1 - 3e-4)), count=24)[0] < 0
    assert fold_gap(Pair(m1, m2, d_c * (1 + 3e-4)), count=24)[0] > 0


def test_lmax_cap_is_validated_defaulted_and_echoed(stub):
    import grpc

    from penumbra_shim._wire import horizons_pb2 as pb

    def opened(finder: ps.FinderOptions):
        spec = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0, 0, 0), 1.0),), finder=finder).to_wire()
        return stub.OpenRun(pb.OpenRunRequest(spec=spec)).run.spec.finder

    assert opened(ps.FinderOptions(lmax=8)).lmax_cap == 24             # max(24, lmax_common 16)
    assert opened(ps.FinderOptions(lmax=8, lmax_common=28)).lmax_cap == 28
    assert opened(ps.FinderOptions(lmax=8, lmax_cap=20)).lmax_cap == 20
    bad = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0, 0, 0), 1.0),),
                     finder=ps.FinderOptions(lmax=8, lmax_cap=12)).to_wire()  # below lmax_common 16
    with pytest.raises(grpc.RpcError) as info:
        stub.OpenRun(pb.OpenRunRequest(spec=bad))
    assert info.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "spec.finder.lmax_cap" in info.value.details()
    with pytest.raises(ValueError, match="finder.lmax_cap"):
        ps.FinderOptions(lmax_cap=40)


def test_a_common_search_whose_start_leaves_the_data_says_so_not_no_candidate():
    # A search that may find nothing yet: "no trapped surface here yet" only when the data covered
    # its starting surfaces; a starting surface beyond the data is "outside data".
    from penumbra_server.numerics.spacetimes import BrillLindquist, sample_patch
    from penumbra_server.numerics.slices import Slice
    from penumbra_server.numerics.surfaces import Surface
    from penumbra_server.server.jobs import REASON_OUTSIDE_DATA, SurfaceJob, run_surface_job

    pair = BrillLindquist(masses=(0.5, 0.5), positions=((0.5, 0.0, 0.0), (-0.5, 0.0, 0.0)))
    patch = sample_patch(pair, origin=(-0.9, -0.9, -0.9), spacing=(0.06,) * 3, shape=(31, 31, 31), level=0,
                         variable_set="adm")
    data = Slice(time=0.0, iteration=0, variable_set="adm", patches=(patch,))
    job = SurfaceJob(label="common", data=data, lmax=8, tolerance=1e-8, max_iterations=10,
                     seed=Surface.sphere((0.0, 0.0, 0.0), 1.2, 8), fallback_to_flow=False, may_not_exist=True)
    outcome = run_surface_job(job)
    assert not outcome.found and outcome.reason == REASON_OUTSIDE_DATA, outcome.message
    assert "no trapped surface" not in outcome.message
