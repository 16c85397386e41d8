"""Every MOTS in the report: ``mots.png`` draws the area of every surface the run followed
(individual horizons, the common horizon and any surface inside it) against time, above the
principal eigenvalue of each one's stability operator (numerics/stability.py) with its error
bar; ``summary.txt`` gets the last eigenvalue per surface.

A positive eigenvalue marks a strictly stable MOTS (an outer horizon), a negative one an unstable
MOTS (an inner common surface); they meet at zero where the two are born together. Archives
written before the eigenvalue was stored draw areas only (the plot says so)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from penumbra_server.cli.safe_text import terminal_safe

from .loading import ArchivedRun, found_rows
from .numbers import RunSummary

__all__ = ["stability_series", "plot_mots", "stability_lines"]


def stability_series(record: ArchivedRun, label: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(time (M), principal eigenvalue (1/M^2), its error (1/M^2)) of the found rows of ``label``
    with a finite eigenvalue; empty arrays for archives without the column."""
    cols = record.surfaces[label]
    if "stability_eigenvalue" not in cols:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    rows = found_rows(cols)
    value = np.asarray(cols["stability_eigenvalue"], dtype=float)[rows]
    error = np.asarray(cols.get("stability_eigenvalue_error", np.full(value.shape, np.nan)), dtype=float)
    error = error[rows] if error.shape != value.shape else error
    keep = np.isfinite(value)
    return np.asarray(cols["time"], dtype=float)[rows][keep], value[keep], error[keep]


def plot_mots(record: ArchivedRun, summary: RunSummary, path: Path):
    """Area with error bars (top) and stability eigenvalue with error bars (bottom) against time,
    one line per surface labelled with its label; returns a :class:`~.plots.PlotInfo`."""
    from .plots import PlotInfo, _colours, _mark_common, _new_figure, _panel_limits

    fig, axes = _new_figure(7.5, 6.0, nrows=2)
    colours = _colours(record.labels)
    eigen_drawn = 0
    for label in record.labels:
        cols = record.surfaces[label]
        rows = found_rows(cols)
        if not rows.size:
            continue
        t = np.asarray(cols["time"], dtype=float)[rows]
        area = np.asarray(cols["area"], dtype=float)[rows]
        area_err = np.asarray(cols["area_error"], dtype=float)[rows] if "area_error" in cols else None
        axes[0, 0].errorbar(t, area, yerr=_finite_or_none(area_err), fmt="o-", ms=3, capsize=2,
                            color=colours[label], label=label)
        ts, value, error = stability_series(record, label)
        if ts.size:
            eigen_drawn += 1
            axes[1, 0].errorbar(ts, value, yerr=_finite_or_none(error), fmt="o-", ms=3, capsize=2,
                                color=colours[label], label=label)
    axes[1, 0].axhline(0.0, color="0.3", linewidth=0.8)
    for ax in axes[:, 0]:
        _mark_common(ax, summary)
        ax.grid(alpha=0.3)
    axes[0, 0].set_ylabel("area  [M$^2$]")
    axes[1, 0].set_ylabel("stability eigenvalue  [1/M$^2$]")
    axes[1, 0].set_xlabel("coordinate time  [M]")
    title = f"{terminal_safe(record.name or record.run_id)}: every MOTS, area and stability"
    axes[0, 0].set_title(title if eigen_drawn else title + " (no stability eigenvalue in this archive)")
    if any(found_rows(record.surfaces[l]).size for l in record.labels):
        axes[0, 0].legend(loc="best", fontsize="small")
    fig.savefig(path)
    return PlotInfo(path, _panel_limits(axes.ravel()), fig)


def _finite_or_none(error):
    if error is None or not np.any(np.isfinite(error)):
        return None
    return np.where(np.isfinite(error), error, 0.0)


def stability_lines(record: ArchivedRun) -> list[str]:
    """Summary lines: the last found stability eigenvalue per surface, with its error and sign."""
    lines = ["", "stability of each MOTS (principal eigenvalue, last found value +- error):"]
    any_value = False
    for label in record.labels:
        t, value, error = stability_series(record, label)
        if not t.size:
            continue
        any_value = True
        err = f" +- {error[-1]:.1e}" if math.isfinite(error[-1]) else ""
        kind = "stable" if value[-1] > 0 else "unstable" if value[-1] < 0 else "marginal"
        lines.append(f"  {label:<10} {value[-1]:+.5f}{err} 1/M^2 at t = {t[-1]:.3f} M ({kind})")
    if not any_value:
        lines.append("  (no stability eigenvalues in this archive)")
    return lines
