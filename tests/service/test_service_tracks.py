"""Tracks through the service: horizon centroids over time, the puncture integrated from the
shift the slices carry (d x^i / dt = -beta^i; Campanelli, Lousto, Marronetti & Zlochower, PRL 96,
111101 (2006); Baker, Centrella, Choi, Koppitz & van Meter, PRL 96, 111102 (2006);
docs/references.md item 13), forecasts archived with their uncertainty and used to seed the next
search, and all of it surviving a server restart."""

from __future__ import annotations

import time

import numpy as np

import penumbra_shim as ps
from penumbra_server.archive import open_archive
from penumbra_server.server import BackgroundServer, ServerOptions

from tracking_support import bl_patches, cube

MASS = 0.5
RADIUS = 0.3        # of the puncture's circle about the origin, M
OMEGA0 = 0.5        # angular velocity at t = 0, 1/M
EPS = 0.2           # Omega(t) = OMEGA0 (1 + EPS t): the shift changes between slices
DT = 0.25           # slice cadence, M
SLICES = 6
Z0 = 0.013          # off the plane z = 0, so no node layer is a symmetry plane


def _phase(t):
    return OMEGA0 * (t + 0.5 * EPS * t * t)


def _puncture(t) -> np.ndarray:
    return np.array([RADIUS * np.cos(_phase(t)), RADIUS * np.sin(_phase(t)), Z0])


def _slice(index: int) -> ps.OutgoingSlice:
    """A Brill-Lindquist hole at the puncture's position, with the shift that moves it there:
    beta = -Omega(t) z_hat x x, so dx/dt = -beta = Omega(t) z_hat x x keeps it on its circle."""
    t = DT * index
    box = cube((0.0, 0.0, 0.0), 0.9, 0.05)
    (patch,) = bl_patches([box], (MASS,), [_puncture(t)])
    x, y, _ = np.meshgrid(*box.node_axes(), indexing="ij")
    omega = OMEGA0 * (1 + EPS * t)
    fields = dict(patch.fields, shift_x=omega * y, shift_y=-omega * x, shift_z=np.zeros_like(x))
    return ps.build_slice(time=t, iteration=10 * index, variable_set="conformal_w",
                          patches=[ps.PatchData(origin=patch.origin, spacing=patch.spacing, fields=fields)])


def _spec(name: str) -> ps.RunSpec:
    # steering interval = 8 cadences: the forecast's 9 lead times fall on the next slices' times.
    return ps.RunSpec(variable_set="conformal_w", bodies=(ps.Body("A", tuple(_puncture(0.0)), MASS),), name=name,
                      finder=ps.FinderOptions(lmax=6), backlog=ps.BacklogOptions(queue_depth=SLICES),
                      refinement=ps.RefinementOptions(steering_interval=8 * DT), shift_gauge="moving_puncture")


def test_puncture_and_horizon_tracks_and_forecast_seeds(client, archive_root):
    run = client.open_run(_spec("puncture on a circle"), cache_results=False)
    for index in range(SLICES):
        run.submit(_slice(index))
    assert run.flush(60)
    run.close()
    events = list(client.watch(run.run_id, timeout_s=600))
    updates = [e.track for e in events if e.kind == "track_updated"]
    assert [u.label for u in updates] == ["A"] * SLICES
    assert all(u.horizon is not None and u.horizon.source == "horizon" for u in updates)
    assert [u.puncture.source for u in updates] == ["puncture"] * SLICES
    # The track starts at the first centroid; the first step has two shift slices (trapezoidal,
    # 2nd order), later ones three (shift quadratic in time, 3rd-order Runge-Kutta).
    assert [(u.puncture_method, u.puncture_order) for u in updates] == (
        [("", 0), ("trapezoidal", 2)] + [("quadratic_rk3", 3)] * (SLICES - 2))
    start_offset = np.linalg.norm(updates[0].puncture.position - _puncture(0.0))
    errors = []
    for index, u in enumerate(updates):
        truth = _puncture(DT * index)
        error = float(np.linalg.norm(u.puncture.position - truth))
        errors.append(error)
        # The stated uncertainty (summed step estimates) covers the integration error; the start
        # offset (centroid vs puncture at the first slice) is carried along unchanged.
        assert error <= u.puncture.uncertainty + start_offset + 1e-6, (index, error, u.puncture.uncertainty)
        assert np.linalg.norm(u.horizon.position - truth) < 5e-3
    print(f"\npuncture track from the shift: position errors {['%.1e' % e for e in errors]} M "
          f"(start offset {start_offset:.1e} M; cadence {DT} M, Omega dt = {OMEGA0 * DT})")
    assert max(errors) < 2e-3

    view = open_archive(archive_root, run.run_id)
    track = view.track("A")
    assert sorted(track["source"].tolist()) == [1] * SLICES + [2] * SLICES
    punctures = view.track("A", source="puncture")
    np.testing.assert_allclose(punctures["position"], [u.puncture.position for u in updates], atol=1e-15)
    assert punctures["order"].tolist() == [0, 2] + [3] * (SLICES - 2)
    dataset = view.group_dataset("tracks/A")
    assert dataset["position"].dims == ("point", "xyz")

    # Forecasts: one per slice over the steering interval, with uncertainty; the next slice was
    # seeded exactly at the forecast position for its time (lead 1), with that uncertainty.
    forecasts = view.forecasts("A")
    surfaces = view.surface("A")
    assert forecasts["position"].shape == (SLICES, 9, 3)
    np.testing.assert_allclose(forecasts["lead_time"][:, 1] - forecasts["time"], DT)
    assert forecasts["model"].tolist() == [1] + [2] * (SLICES - 1)  # static, then polynomial
    assert np.all(np.isinf(forecasts["uncertainty"][0])) and np.all(np.isfinite(forecasts["uncertainty"][1:]))
    assert surfaces["seed_model"].tolist() == [0] + forecasts["model"][:-1].tolist()
    np.testing.assert_allclose(surfaces["seed_centre"][1:], forecasts["position"][:-1, 1], atol=1e-12)
    np.testing.assert_allclose(surfaces["seed_uncertainty"][1:], forecasts["uncertainty"][:-1, 1], rtol=1e-12)
    # ... and the surface it found lies within that uncertainty of the seed (from the third slice
    # on, once a quadratic fits).
    miss = np.linalg.norm(surfaces["centroid"][2:] - surfaces["seed_centre"][2:], axis=1)
    assert np.all(miss <= surfaces["seed_uncertainty"][2:]), (miss, surfaces["seed_uncertainty"][2:])


def test_tracking_state_survives_a_restart(tmp_path):
    options = ServerOptions(workers=1)
    with BackgroundServer(archive_root=tmp_path, workers=1, options=options) as first:
        with ps.connect(first.address) as c:
            run = c.open_run(_spec("restart"), cache_results=False)
            for index in range(3):
                run.submit(_slice(index))
            assert run.flush(60)
            deadline = time.monotonic() + 120
            while c.get_run(run.run_id).slices_processed < 3:
                if time.monotonic() > deadline:
                    pytest.fail("the three slices were not processed within 120 s")
                time.sleep(0.05)
            before = c.latest_guidance(run.run_id)
            run_id = run.run_id
    with BackgroundServer(archive_root=tmp_path, workers=1, options=options) as second:
        with ps.connect(second.address) as c:
            restored = c.latest_guidance(run_id)  # answered from the archive's last guidance
            assert restored is not None and restored.iteration == before.iteration == 20
            assert restored.windows is not None and restored.windows.iteration == 20
            np.testing.assert_array_equal(restored.body("A").radii, before.body("A").radii)
            run = c.attach_run(run_id, cache_results=False)
            run.submit(_slice(3))
            assert run.flush(60)
            run.close()
            events = list(c.watch(run_id, timeout_s=600))
    seqs = [e.seq for e in events]
    assert seqs == list(range(1, len(seqs) + 1))
    view = open_archive(tmp_path, run_id)
    # The slice after the restart was seeded from the restored horizon track (a quadratic through
    # three points), not from scratch.
    assert view.surface("A")["seed_model"].tolist() == [0, 1, 2, 2]
    assert view.track("A", source="horizon")["iteration"].tolist() == [0, 10, 20, 30]
    # The puncture track resumes as a new segment from the first centroid after the restart.
    assert view.track("A", source="puncture")["order"].tolist() == [0, 2, 3, 0]
