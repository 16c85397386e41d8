"""The report's spin: ``spin.png`` draws the archived chi and spin-axis angle per surface, and
``summary.txt`` lists chi and the Christodoulou mass with error bars and the common surface's
remnant with its settled flag. The archive is written with the real archive writer; the spin
values are chosen (a steady remnant, a precessing body) so the plot and the remnant rule have
something definite to show."""

from __future__ import annotations

import math
import time

import numpy as np

from penumbra_server.archive import SLICE_OUTCOME_PROCESSED, ArchiveWriter, open_archive
from penumbra_server.cli.report import write_report
from penumbra_server.numerics.surfaces import Surface

LMAX = 2
TIMES = np.arange(12) * 2.0  # M: 22 M of samples, the remnant window is the last 10 M


def _row(t: float, seq: int, chi: float, direction, centre) -> dict:
    j = chi  # M_chr = 1
    return {"iteration": int(t * 10), "time": float(t), "status": 0, "found": True, "reason": 0,
            "centre": np.asarray(centre, float), "centroid": np.asarray(centre, float),
            "coefficients": np.asarray(Surface.sphere(centre, 0.9, LMAX).coefficients), "area": 16 * math.pi * 0.9,
            "irreducible_mass": math.sqrt(0.9), "irreducible_mass_error": 1e-4, "area_error": 1e-3,
            "akv_angular_momentum": j, "akv_angular_momentum_error": 2e-4, "spin_direction": np.asarray(direction, float),
            "dimensionless_spin": chi, "dimensionless_spin_error": 3e-4, "akv_christodoulou_mass": 1.0,
            "akv_christodoulou_mass_error": 1e-4, "residual_max": 1e-9, "event_seq": seq,
            "archived_unix_s": time.time()}


def test_spin_plot_and_summary_show_the_archived_spin(tmp_path):
    spec = {"display_name": "spin-report", "variable_set": "adm", "mass_scale_solar_masses": 0.0,
            "bodies": [{"label": "A", "position": [2.0, 0.0, 0.0], "mass": 0.5}],
            "finder": {"lmax": LMAX, "tolerance": 1e-9, "max_iterations": 40},
            "backlog": {"queue_depth": 4, "policy": "keep_newest"}}
    writer = ArchiveWriter.create(tmp_path, "run-0123456789cd", name="spin-report", run_spec=spec,
                                  surface_labels=("A", "common"), lmax=LMAX, software_version="test",
                                  created_unix_s=time.time())
    seq = 1
    for t in TIMES:
        tilt = 0.05 * t  # body A's axis precesses away from +z
        a = _row(t, seq, 0.3 + 0.01 * t, (math.sin(tilt), 0.0, math.cos(tilt)), (2.0, 0.0, 0.0))
        common = _row(t, seq + 1, 0.68, (0.0, 0.0, 1.0), (0.0, 0.0, 0.0))
        writer.commit(slice_rows=[{"iteration": int(t * 10), "time": float(t), "outcome": SLICE_OUTCOME_PROCESSED,
                                   "bytes": 1000, "arrival_unix_s": time.time(), "latency_s": 0.5,
                                   "surfaces_attempted": 2, "surfaces_found": 2, "event_seq": seq + 2}],
                      surface_rows={"A": [a], "common": [common]})
        seq += 3
    result = write_report(writer.path, tmp_path / "report")
    assert "spin.png" in [p.name for p in result.plots]

    view = open_archive(writer.path)
    chi_axes, angle_axes = result.figures["spin.png"].axes[:2]
    for label in ("A", "common"):
        rows = view.surface(label)
        direction = np.asarray(rows["spin_direction"])
        angle = np.arctan2(np.hypot(direction[:, 0], direction[:, 1]), direction[:, 2])
        (chi_line,) = [l for l in chi_axes.lines if l.get_label() == label]
        (angle_line,) = [l for l in angle_axes.lines if l.get_label() == label]
        assert np.array_equal(chi_line.get_xdata(), rows["time"]) and np.array_equal(angle_line.get_xdata(), rows["time"])
        assert np.array_equal(chi_line.get_ydata(), rows["dimensionless_spin"])
        assert np.allclose(angle_line.get_ydata(), angle, rtol=0, atol=1e-15)
    # Body A's axis tilts by 0.05 rad per M (as written above): the plot shows it.
    (a_angle,) = [l for l in angle_axes.lines if l.get_label() == "A"]
    assert abs(a_angle.get_ydata()[-1] - 0.05 * TIMES[-1]) < 1e-12

    text = result.summary_path.read_text()
    assert f"A          chi {0.3 + 0.01 * TIMES[-1]:.5f} +- 3.0e-04   M_chr 1.000000 +- 1.0e-04 M" in text
    assert "common     chi 0.68000 +- 3.0e-04   M_chr 1.000000 +- 1.0e-04 M" in text
    # The common surface's spin is steady over the last 10 M: the remnant rule says settled.
    assert "remnant (common): settled over t = 12.000 .. 22.000 M (6 samples): chi 0.68000 +- 3.0e-04" in text
