"""The common-horizon watch through the service: an equal-mass Brill-Lindquist pair approaching
along a shrinking track. The common horizon first appears at the published critical separation,
is announced once, the individual horizons are still found after it, every surface's status is
reported every slice, and the guidance after merger is a single region around the remnant.

Published value (docs/references.md item 7): for two equal bare masses m a common apparent horizon
exists only below a coordinate separation d_c of about 1.53 m (Cadez, Ann. Phys. 83, 449 (1974);
Bishop, GRG 14, 717 (1982); values from memory), an independent axisymmetric calculation made
for this project gave 1.5324 m. With m = 0.5 (total bare mass M = 1) d_c = 0.766 M.
"""

from __future__ import annotations

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_server.archive import open_archive

from tracking_support import bl_patches, cube, surface_points

MASS = 0.5                      # each bare mass m; total M = 1
CRITICAL_SEPARATION = 0.766     # 1.53 m (Cadez 1974; Bishop 1982; from memory) = 1.5324 m here, in M
STEP = 0.01                     # the sequence's separation step, M
SEPARATIONS = np.round(np.arange(0.80, 0.745, -STEP), 6)   # 0.80 .. 0.75, shrinking
SPACING = 0.05                  # one coarse box, 53^3 nodes over [-1.3, 1.3]^3
LMAX = 8                        # individual horizons; the common surface gets the server's default
LMAX_COMMON = 16                # max(16, lmax): a freshly formed common horizon needs more


def _pair_positions(index: int, separation: float) -> np.ndarray:
    phase = 0.15 * index  # the pair also turns a little: a shrinking circular track
    direction = np.array([np.cos(phase), np.sin(phase), 0.0])
    return np.stack([0.5 * separation * direction, -0.5 * separation * direction])


def test_common_horizon_forms_at_the_critical_separation_and_the_individual_ones_remain(client, archive_root):
    spec = ps.RunSpec(variable_set="conformal_w", name="equal-mass approach",
                      bodies=(ps.Body("A", (0.4, 0.0, 0.0), MASS), ps.Body("B", (-0.4, 0.0, 0.0), MASS)),
                      finder=ps.FinderOptions(lmax=LMAX, tolerance=1e-8),
                      backlog=ps.BacklogOptions(queue_depth=len(SEPARATIONS)),
                      refinement=ps.RefinementOptions(steering_interval=1.0))
    run = client.open_run(spec, cache_results=False)
    box = cube((0.0, 0.0, 0.0), 1.3, SPACING)
    for index, d in enumerate(SEPARATIONS):
        run.submit(ps.build_slice(time=0.5 * index, iteration=index, variable_set="conformal_w",
                                  patches=bl_patches([box], (MASS, MASS), _pair_positions(index, d))))
    assert run.flush(120)
    # The server processes every queued slice first; the deadlines only catch a hang (a loaded
    # machine may take minutes for the six slices' finds, inner surfaces and forecasts).
    run.close(timeout_s=900)
    guidance_reply = client.latest_guidance(run.run_id)
    events = list(client.watch(run.run_id, timeout_s=900))

    status = {}  # (iteration, label) -> found?
    reports = {}
    for e in events:
        if e.kind in ("surface_found", "surface_not_found"):
            assert (e.iteration, e.surface.label) not in status, "one status per surface per slice"
            status[(e.iteration, e.surface.label)] = e.kind == "surface_found"
            reports[(e.iteration, e.surface.label)] = e.surface
    common_found = [i for i in range(len(SEPARATIONS)) if status.get((i, "common"))]
    assert common_found, "no common horizon in the sequence"
    first = common_found[0]
    d_first, d_before = SEPARATIONS[first], SEPARATIONS[first - 1]
    print(f"\ncommon horizon first found at d = {d_first:.3f} M (previous slice d = {d_before:.3f} M had none); "
          f"published critical separation 0.766 M (1.53 m, from memory; 1.5324 m independent)")
    # At or just below d_c, with the sequence's step as tolerance; the slice before (above d_c) had none.
    assert CRITICAL_SEPARATION - STEP <= d_first <= CRITICAL_SEPARATION
    assert d_before > CRITICAL_SEPARATION and status[(first - 1, "common")] is False
    # Searched every slice from the first one the watch asked for until found, and kept after it.
    searched = sorted(i for (i, label) in status if label == "common")
    assert searched == list(range(searched[0], len(SEPARATIONS)))
    assert all(status[(i, "common")] for i in range(first, len(SEPARATIONS)))
    # Both individual surfaces are reported in every slice and still found after the merger.
    for i in range(len(SEPARATIONS)):
        assert status[(i, "A")] and status[(i, "B")], f"individual horizons lost at slice {i}"
    # The remnant's irreducible mass lies between the pair's and the sum of the bare masses (area theorem
    # style sanity: M_irr(common) > M_irr(A) and < m_A + m_B = 1).
    remnant = reports[(first, "common")]
    assert reports[(first, "A")].irreducible_mass < remnant.irreducible_mass < 2 * MASS

    formed = [e for e in events if e.kind == "common_horizon_formed"]
    assert len(formed) == 1, "announced exactly once"
    assert formed[0].iteration == first and formed[0].time == pytest.approx(0.5 * first)
    assert formed[0].common.label == "common" and set(formed[0].common.body_labels) == {"A", "B"}
    assert formed[0].common.irreducible_mass == pytest.approx(remnant.irreducible_mass)
    assert formed[0].common.separation == pytest.approx(d_first, abs=0.01)  # centroids sit at the punctures

    # After the merger the guidance is a single region around the remnant, containing the next
    # slice's common horizon.
    guidance = {e.iteration: e.guidance for e in events if e.kind == "refinement_guidance"}
    for i in range(first, len(SEPARATIONS)):
        g = guidance[i]
        assert g.post_merger and [r.bodies for r in g.finest_regions] == [("common",)]
        assert [b.label for b in g.bodies] == ["common"]
    for i in range(first, len(SEPARATIONS) - 1):
        region = guidance[i].finest_regions[0]
        points = surface_points(reports[(i + 1, "common")])
        assert region.sphere_contains(points).all() and region.box_contains(points).all()
    for i in range(first):
        assert not guidance[i].post_merger
    assert guidance_reply.post_merger and guidance_reply.iteration == len(SEPARATIONS) - 1

    view = open_archive(archive_root, run.run_id)
    common_rows = view.surface("common")
    assert common_rows["found"].tolist() == [status[(i, "common")] for i in searched]
    notices = view.tracking_events()
    assert list(notices["kind"]).count("common_horizon_formed") == 1
    assert view.surface_lmax("common") == LMAX_COMMON and view.surface_lmax("A") == LMAX
    assert remnant.lmax == LMAX_COMMON and common_rows["coefficients"].shape[1] == (LMAX_COMMON + 1) ** 2
    assert view.track("common", source="horizon")["iteration"].tolist() == list(range(first, len(SEPARATIONS)))
