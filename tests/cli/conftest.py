"""Fixtures for the command-line tests: a small real archive built from real finds."""

import time

import numpy as np
import pytest

from penumbra_server.archive import SLICE_OUTCOME_PROCESSED, SLICE_OUTCOME_SKIPPED, ArchiveWriter
from penumbra_server.cli.demo_scenario import DemoScenario
from penumbra_server.numerics.finder import FinderSettings, find_surface
from penumbra_server.numerics.measures import measure_surface
from penumbra_server.numerics.spacetimes import BrillLindquist
from penumbra_server.numerics.surfaces import Surface

LMAX = 6
#: Slices of the demo track written to the small archive; index 9 is recorded as skipped.
PROCESSED_INDICES = (0, 10, 14, 20)
SKIPPED_INDEX = 9


def _row(scenario, index, result, quantities, seq):
    t = scenario.time_of(index)
    row = {"iteration": scenario.iteration_of(index), "time": t, "status": result.status,
           "found": bool(result.success), "reason": 0 if result.success else 1,
           "iterations": result.nit, "wall_time_s": result.wall_time_s, "latency_s": 0.1, "event_seq": seq,
           "residual_max": result.residual_max}
    if result.success:
        q = quantities
        row.update(centre=result.surface.centre, coefficients=result.surface.coefficients, area=q.area,
                   irreducible_mass=q.irreducible_mass, centroid=q.centroid,
                   coordinate_radius=[q.radius_min, q.radius_mean, q.radius_max],
                   resolution_indicator=q.resolution_indicator)
    return row


@pytest.fixture(scope="session")
def small_archive(tmp_path_factory):
    """A run archive written with the archive writer from finds on exact Brill-Lindquist geometry.

    Returns (path, expected) where expected holds what the rows say, for the tests to compare.
    """
    scenario = DemoScenario()
    root = tmp_path_factory.mktemp("archive")
    labels = ("heavy", "light", "common")
    spec = {"display_name": "cli-test", "variable_set": "conformal_w", "mass_scale_solar_masses": 0.0,
            "bodies": [{"label": b["label"], "position": list(b["position"]), "mass": b["mass"]} for b in scenario.bodies()],
            "finder": {"lmax": LMAX, "tolerance": 1e-9, "max_iterations": 40},
            "backlog": {"queue_depth": 4, "policy": "keep_newest"}}
    writer = ArchiveWriter.create(root, "run-0123456789ab", name="cli-test", run_spec=spec, surface_labels=labels,
                                  lmax=LMAX, software_version="test", created_unix_s=time.time())
    settings = FinderSettings(lmax=LMAX, tolerance=1e-9)
    expected = {label: [] for label in labels}
    seq = 1
    for index in sorted(PROCESSED_INDICES + (SKIPPED_INDEX,)):
        t = scenario.time_of(index)
        if index == SKIPPED_INDEX:
            writer.commit(slice_rows=[{"iteration": scenario.iteration_of(index), "time": t, "outcome": SLICE_OUTCOME_SKIPPED,
                                       "bytes": 1000, "arrival_unix_s": time.time(), "event_seq": seq}])
            seq += 1
            continue
        positions = scenario.track.positions(t)
        spacetime = BrillLindquist(np.asarray(scenario.track.masses), positions)
        guesses = {"heavy": Surface.sphere(positions[0], 0.3, LMAX), "light": Surface.sphere(positions[1], 0.2, LMAX),
                   "common": Surface.sphere(np.zeros(3), 0.7, LMAX)}
        surface_rows = {}
        found = 0
        for label in labels:
            result = find_surface(spacetime.geometry, guesses[label], settings=settings)
            q = measure_surface(result.surface, spacetime.geometry) if result.success else None
            surface_rows[label] = [_row(scenario, index, result, q, seq)]
            expected[label].append((t, scenario.iteration_of(index), bool(result.success),
                                    q.irreducible_mass if q else float("nan")))
            found += int(result.success)
            seq += 1
        writer.commit(slice_rows=[{"iteration": scenario.iteration_of(index), "time": t, "outcome": SLICE_OUTCOME_PROCESSED,
                                   "bytes": 1000, "arrival_unix_s": time.time(), "latency_s": 0.5,
                                   "surfaces_attempted": 3, "surfaces_found": found, "event_seq": seq}],
                      surface_rows=surface_rows)
        seq += 1
    expected["skipped_iterations"] = (scenario.iteration_of(SKIPPED_INDEX),)
    return writer.path, expected


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """One `penumbra demo` run (server and evolution subprocesses, the real demo data), shared
    by the tests that check its output, its archive, its control run and its report.

    Returns (workdir, completed process). About 55 s on two idle cores; the pretend evolution
    waits for the server when it runs ahead (demo_evolution.LEAD_SLICES), so a busy machine
    takes longer and the deadline is generous. The tests using it are marked slow.
    """
    import os
    import subprocess
    import sys

    workdir = tmp_path_factory.mktemp("demo")
    env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1")
    done = subprocess.run([sys.executable, "-m", "penumbra_server.cli.main", "demo", "--workdir", str(workdir)],
                          capture_output=True, text=True, timeout=900, env=env)
    return workdir, done
