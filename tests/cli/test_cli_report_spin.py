"""The report's spin and multipoles: ``spin.png`` draws the archived chi and spin-axis angle per
surface, ``multipoles.png`` the first mass and spin multipoles against time and the remnant's
moments relaxing, and ``summary.txt`` lists chi and the Christodoulou mass with error bars and the
common surface's remnant with its settled flag and how far each value still moves. The archive is written with the real archive writer; the spin
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


def _multipoles(t: float, relaxing: bool) -> tuple[np.ndarray, np.ndarray]:
    """Mass and spin multipoles n = 0..8: steady, or (the remnant) relaxing as exp(-t / 4 M)."""
    decay = math.exp(-t / 4.0) if relaxing else 0.0
    mass = np.array([1.0, 0.0, -0.12 + 0.05 * decay, 0.01 * decay, 0.02 + 0.01 * decay, 0, 0, 0, 0])
    spin = np.array([0.0, 0.68, 0.02 * decay, -0.05 + 0.03 * decay, 0, 0, 0, 0, 0])
    return mass, spin


def _row(t: float, seq: int, chi: float, direction, centre, relaxing: bool = False) -> dict:
    j = chi  # M_chr = 1
    mass, spin = _multipoles(t, relaxing)
    return {"mass_multipoles": mass, "spin_multipoles": spin, "mass_multipoles_error": np.full(9, 1e-4),
            "spin_multipoles_error": np.full(9, 2e-4),"iteration": int(t * 10), "time": float(t), "status": 0, "found": True, "reason": 0,
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
        common = _row(t, seq + 1, 0.68, (0.0, 0.0, 1.0), (0.0, 0.0, 0.0), relaxing=True)
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
    # The error bars as bands about each line: chi +- 3e-4 as archived.
    bands = [c for c in chi_axes.collections if len(c.get_paths())]
    assert len(bands) == 2
    top = bands[0].get_paths()[0].vertices[:, 1]
    assert np.isclose(top.max(), 0.3 + 0.01 * TIMES[-1] + 3e-4) and np.isclose(top.min(), 0.3 - 3e-4)
    # Body A's axis tilts by 0.05 rad per M (as written above): the plot shows it.
    (a_angle,) = [l for l in angle_axes.lines if l.get_label() == "A"]
    assert abs(a_angle.get_ydata()[-1] - 0.05 * TIMES[-1]) < 1e-12

    text = result.summary_path.read_text()
    assert f"A          chi {0.3 + 0.01 * TIMES[-1]:.5f} +- 3.0e-04   M_chr 1.000000 +- 1.0e-04 M" in text
    assert "common     chi 0.68000 +- 3.0e-04   M_chr 1.000000 +- 1.0e-04 M" in text
    # The common surface's spin is steady over the last 10 M: the remnant rule says settled.
    line = next(l for l in text.splitlines() if l.startswith("remnant (common): "))
    assert line.startswith("remnant (common): settled over t = 12.000 .. 22.000 M (6 samples): ")
    assert "chi 0.68000 +- 3.0e-04" in line and "M_chr 1.000000 +- 1.0e-04 M" in line
    assert "spin axis (+0.000, +0.000, +1.000)" in line
    # How well it has settled: nothing moved over the window, 0 error bars.
    assert "spread over the window in error bars: M_irr 0, M_chr 0, chi 0, J 0" in line


def test_multipole_plot_shows_the_archived_moments_and_the_remnant_relaxing(tmp_path):
    spec = {"display_name": "multipole-report", "variable_set": "adm", "mass_scale_solar_masses": 0.0,
            "bodies": [{"label": "A", "position": [2.0, 0.0, 0.0], "mass": 0.5}],
            "finder": {"lmax": LMAX, "tolerance": 1e-9, "max_iterations": 40},
            "backlog": {"queue_depth": 4, "policy": "keep_newest"}}
    writer = ArchiveWriter.create(tmp_path, "run-0123456789ce", name="multipole-report", run_spec=spec,
                                  surface_labels=("A", "common"), lmax=LMAX, software_version="test",
                                  created_unix_s=time.time())
    seq = 1
    for t in TIMES:
        writer.commit(surface_rows={"A": [_row(t, seq, 0.3, (0, 0, 1), (2.0, 0.0, 0.0))],
                                    "common": [_row(t, seq + 1, 0.68, (0, 0, 1), (0, 0, 0), relaxing=True)]})
        seq += 2
    result = write_report(writer.path, tmp_path / "report")
    assert "multipoles.png" in [p.name for p in result.plots]
    view = open_archive(writer.path)
    mass_axes, spin_axes, relax_axes = result.figures["multipoles.png"].axes[:3]
    for label in ("A", "common"):
        rows = view.surface(label)
        for axes, kind, orders, symbol in ((mass_axes, "mass_multipoles", (2, 3, 4), "M"),
                                           (spin_axes, "spin_multipoles", (1, 2, 3), "J")):
            for n in orders:
                (line,) = [l for l in axes.lines if l.get_label() == f"{label} {symbol}{n}"]
                assert np.array_equal(line.get_xdata(), rows["time"])
                assert np.array_equal(line.get_ydata(), rows[kind][:, n])
    # The remnant's M_2 relaxes as 0.05 exp(-t / 4): its change from the latest value falls by
    # exp(-2 / 4) per 2 M sample, as written.
    (relax,) = [l for l in relax_axes.lines if l.get_label() == "|M2(t) - M2(latest)|"]
    change = np.asarray(relax.get_ydata())
    expected = 0.05 * np.abs(np.exp(-TIMES[:-1] / 4.0) - np.exp(-TIMES[-1] / 4.0))
    np.testing.assert_allclose(change, expected, rtol=1e-9)
    assert np.all(np.diff(change) < 0)
