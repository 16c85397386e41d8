"""The report's MOTS plot: ``mots.png`` draws the archived area and stability eigenvalue (with
error bars) of every surface, individual, common and inner common alike, and ``summary.txt``
names each one's last eigenvalue and its sign. The archive is written with the real archive
writer; the values are invented (an outer and an inner common surface whose eigenvalues start
near zero and separate, as they do after the two are born together) so the plot has something
definite to show."""

from __future__ import annotations

import math
import time

import numpy as np
import pytest

from penumbra_server.archive import SLICE_OUTCOME_PROCESSED, ArchiveWriter, open_archive
from penumbra_server.cli.report import write_report
from penumbra_server.numerics.surfaces import Surface

LMAX = 2
TIMES = np.arange(6) * 1.5  # M
LABELS = ("A", "B", "common", "common_inner")


def _row(t: float, seq: int, label: str, found: bool) -> dict:
    radius = {"A": 0.5, "B": 0.45, "common": 1.2, "common_inner": 1.0}[label]
    eigen = {"A": 0.9, "B": 1.1, "common": 0.02 * (1 + t), "common_inner": -0.02 * (1 + t)}[label]
    area = 4 * math.pi * radius**2
    row = {"iteration": int(t * 10), "time": float(t), "status": 0 if found else 5, "found": found, "reason": 0 if found else 1,
           "centre": np.zeros(3), "centroid": np.zeros(3),
           "coefficients": np.asarray(Surface.sphere((0, 0, 0), radius, LMAX).coefficients),
           "area": area if found else math.nan, "area_error": 1e-3 * area if found else math.nan,
           "irreducible_mass": math.sqrt(area / (16 * math.pi)) if found else math.nan,
           "residual_max": 1e-9, "event_seq": seq, "archived_unix_s": time.time()}
    if found:
        row.update(stability_eigenvalue=eigen, stability_eigenvalue_error=1e-4)
    return row


def test_mots_plot_and_summary_show_every_surface_and_its_stability(tmp_path):
    spec = {"display_name": "mots-report", "variable_set": "adm", "mass_scale_solar_masses": 0.0,
            "bodies": [{"label": "A", "position": [1.0, 0.0, 0.0], "mass": 0.5},
                       {"label": "B", "position": [-1.0, 0.0, 0.0], "mass": 0.5}],
            "finder": {"lmax": LMAX, "tolerance": 1e-9, "max_iterations": 40},
            "backlog": {"queue_depth": 4, "policy": "keep_newest"}}
    writer = ArchiveWriter.create(tmp_path, "run-0123456789ab", name="mots-report", run_spec=spec,
                                  surface_labels=LABELS, lmax=LMAX, software_version="test", created_unix_s=time.time())
    seq = 1
    for i, t in enumerate(TIMES):
        common_found = i >= 2  # the common pair appears at the third slice
        rows = {label: [_row(t, seq + k, label, common_found or not label.startswith("common"))]
                for k, label in enumerate(LABELS)}
        writer.commit(slice_rows=[{"iteration": int(t * 10), "time": float(t), "outcome": SLICE_OUTCOME_PROCESSED,
                                   "bytes": 1000, "arrival_unix_s": time.time(), "latency_s": 0.5,
                                   "surfaces_attempted": 4, "surfaces_found": 4 if common_found else 2,
                                   "event_seq": seq + 4}], surface_rows=rows)
        seq += 5
    result = write_report(writer.path, tmp_path / "report")
    assert "mots.png" in [p.name for p in result.plots]

    view = open_archive(writer.path)
    area_axes, eigen_axes = result.figures["mots.png"].axes[:2]
    for label in LABELS:
        rows = view.surface(label)
        found = np.asarray(rows["found"], dtype=bool)
        (area_bars,) = [c for c in area_axes.containers if c.get_label() == label]
        (eigen_bars,) = [c for c in eigen_axes.containers if c.get_label() == label]
        assert np.array_equal(area_bars.lines[0].get_xdata(), rows["time"][found])
        assert np.array_equal(area_bars.lines[0].get_ydata(), rows["area"][found])
        assert np.array_equal(eigen_bars.lines[0].get_ydata(), rows["stability_eigenvalue"][found])
        assert eigen_bars.has_yerr
    # Only two slices lack the common pair: each common surface is drawn on the last four.
    (inner,) = [c for c in eigen_axes.containers if c.get_label() == "common_inner"]
    assert inner.lines[0].get_xdata().size == 4 and np.all(inner.lines[0].get_ydata() < 0)

    # areas_masses.png shades each surface's archived area error bar around its line.
    area_panel = result.figures["areas_masses.png"].axes[0]
    (band,) = [c for c in area_panel.collections if c.get_label() == "_common error"]
    rows = view.surface("common")
    found = np.asarray(rows["found"], dtype=bool)
    top = band.get_paths()[0].vertices[:, 1].max()
    assert top == pytest.approx(float(np.max(rows["area"][found] + rows["area_error"][found])), rel=1e-12)

    text = result.summary_path.read_text()
    last = TIMES[-1]
    assert f"common     {0.02 * (1 + last):+.5f} +- 1.0e-04 1/M^2 at t = {last:.3f} M (stable)" in text
    assert f"common_inner {-0.02 * (1 + last):+.5f} +- 1.0e-04 1/M^2 at t = {last:.3f} M (unstable)" in text
    assert "A          +0.90000 +- 1.0e-04 1/M^2" in text


def test_archives_without_the_eigenvalue_draw_areas_only(tmp_path):
    spec = {"display_name": "old", "variable_set": "adm", "mass_scale_solar_masses": 0.0,
            "bodies": [{"label": "A", "position": [0.0, 0.0, 0.0], "mass": 0.5}],
            "finder": {"lmax": LMAX, "tolerance": 1e-9, "max_iterations": 40},
            "backlog": {"queue_depth": 4, "policy": "keep_newest"}}
    writer = ArchiveWriter.create(tmp_path, "run-0123456789ac", name="old", run_spec=spec, surface_labels=("A",),
                                  lmax=LMAX, software_version="test", created_unix_s=time.time())
    row = _row(0.0, 1, "A", True)
    row.pop("stability_eigenvalue"), row.pop("stability_eigenvalue_error")
    writer.commit(slice_rows=[{"iteration": 0, "time": 0.0, "outcome": SLICE_OUTCOME_PROCESSED, "bytes": 10,
                               "arrival_unix_s": time.time(), "latency_s": 0.1, "surfaces_attempted": 1,
                               "surfaces_found": 1, "event_seq": 2}], surface_rows={"A": [row]})
    result = write_report(writer.path, tmp_path / "report")
    area_axes, eigen_axes = result.figures["mots.png"].axes[:2]
    assert "no stability eigenvalue" in area_axes.get_title()
    assert [c.get_label() for c in area_axes.containers] == ["A"] and not eigen_axes.containers
    assert "(no stability eigenvalues in this archive)" in result.summary_path.read_text()
