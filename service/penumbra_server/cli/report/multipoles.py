"""Horizon multipoles in the report: ``multipoles.png``.

Top: the first mass multipoles M_n / M^(n+1) (n = 2, 3, 4) of every surface against time; middle:
the first spin multipoles J_n / M^(n+1) (n = 1, 2, 3; J_1 / M^2 is chi); shaded bands are the
archived error bars where the archive has them. Bottom: after the merger, how the remnant's
moments relax: |X_n(t) - X_n(t_latest)| of the common surface on a log scale, beside the
latest value's error bar (dashed), so a moment has settled where its curve falls below its bar.

Reads the archive's ``mass_multipoles`` / ``spin_multipoles`` columns (and ``*_error``);
archives without them get empty panels that say so.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from penumbra_server.cli.safe_text import terminal_safe

from .loading import ArchivedRun, found_rows
from .numbers import RunSummary

__all__ = ["MASS_ORDERS", "SPIN_ORDERS", "multipole_series", "plot_multipoles"]

#: Orders plotted (the first few that are not fixed by definition: M_0 = 1, M_1 = 0 about the
#: centre of mass of the AKV coordinate, J_0 = 0).
MASS_ORDERS = (2, 3, 4)
SPIN_ORDERS = (1, 2, 3)


def multipole_series(record: ArchivedRun, label: str, kind: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(time (M), values (rows, orders), errors (rows, orders)) of ``kind`` ("mass_multipoles" or
    "spin_multipoles") for the found rows of ``label`` with finite values; errors NaN where the
    archive has none. Empty arrays for archives without the column."""
    cols = record.surfaces[label]
    if kind not in cols:
        return np.zeros(0), np.zeros((0, 0)), np.zeros((0, 0))
    rows = found_rows(cols)
    values = np.asarray(cols[kind], dtype=float)[rows]
    values = values.reshape(rows.size, -1)
    errors = (np.asarray(cols[f"{kind}_error"], dtype=float)[rows].reshape(rows.size, -1)
              if f"{kind}_error" in cols else np.full_like(values, np.nan))
    keep = np.any(np.isfinite(values), axis=1)
    return np.asarray(cols["time"], dtype=float)[rows][keep], values[keep], errors[keep]


def _draw(ax, t, values, errors, orders, colour, label, symbol) -> int:
    styles = ("-", "--", ":")
    drawn = 0
    for style, n in zip(styles, orders):
        if n >= values.shape[1] or not np.any(np.isfinite(values[:, n])):
            continue
        ax.plot(t, values[:, n], style, marker="o", ms=2.5, color=colour, label=f"{label} {symbol}{n}")
        if np.any(np.isfinite(errors[:, n])):
            ax.fill_between(t, values[:, n] - errors[:, n], values[:, n] + errors[:, n], color=colour, alpha=0.2,
                            linewidth=0)
        drawn += 1
    return drawn


def _draw_relaxation(ax, t, values, errors, orders, colour, symbol) -> int:
    """|X_n(t) - X_n(latest)| against time (log scale) and the latest error bar, per order."""
    drawn = 0
    for style, n in zip(("-", "--", ":"), orders):
        if n >= values.shape[1] or not np.isfinite(values[-1, n]):
            continue
        change = np.abs(values[:-1, n] - values[-1, n])
        positive = change > 0
        if not np.any(positive):
            continue
        ax.semilogy(t[:-1][positive], change[positive], style, marker="o", ms=2.5, color=colour,
                    label=f"|{symbol}{n}(t) - {symbol}{n}(latest)|")
        if np.isfinite(errors[-1, n]) and errors[-1, n] > 0:
            ax.axhline(errors[-1, n], color=colour, linestyle=(0, (2, 3)), linewidth=0.8)
        drawn += 1
    return drawn


def plot_multipoles(record: ArchivedRun, summary: RunSummary, path: Path):
    """Mass (top) and spin (middle) multipoles against time per surface, and (bottom) the
    remnant's moments relaxing after the merger; returns a :class:`~.plots.PlotInfo`."""
    from .plots import PlotInfo, _colours, _mark_common, _new_figure, _panel_limits

    fig, axes = _new_figure(7.5, 8.5, nrows=3)
    top, middle, bottom = axes[:, 0]
    colours = _colours(record.labels)
    drawn = 0
    for label in record.labels:
        for ax, kind, orders, symbol in ((top, "mass_multipoles", MASS_ORDERS, "M"),
                                         (middle, "spin_multipoles", SPIN_ORDERS, "J")):
            t, values, errors = multipole_series(record, label, kind)
            if t.size:
                drawn += _draw(ax, t, values, errors, orders, colours[label], label, symbol)
    for ax in (top, middle):
        _mark_common(ax, summary)
        ax.grid(alpha=0.3)
    top.set_ylabel("mass multipoles  M_n / M^(n+1)")
    middle.set_ylabel("spin multipoles  J_n / M^(n+1)")
    title = f"{terminal_safe(record.name or record.run_id)}: horizon multipoles"
    top.set_title(title if drawn else title + " (no multipoles in this archive)")
    if drawn:
        top.legend(loc="best", fontsize="x-small", ncol=2)
        middle.legend(loc="best", fontsize="x-small", ncol=2)

    common = summary.common_label
    relaxed = 0
    if common is not None and common in record.surfaces:
        for kind, orders, symbol, colour in (("mass_multipoles", (2, 4), "M", "tab:red"),
                                             ("spin_multipoles", (1, 3), "J", "tab:blue")):
            t, values, errors = multipole_series(record, common, kind)
            if t.size >= 2:
                relaxed += _draw_relaxation(bottom, t, values, errors, orders, colour, symbol)
    bottom.set_xlabel("coordinate time  [M]")
    bottom.set_ylabel("change from the latest value")
    bottom.grid(alpha=0.3)
    if relaxed:
        bottom.set_title(f"remnant ({terminal_safe(common)}) relaxing; dashed: the latest value's error bar",
                         fontsize="small")
        bottom.legend(loc="best", fontsize="x-small", ncol=2)
    else:
        bottom.set_title("remnant: no common surface with multipoles in this archive", fontsize="small")
    fig.savefig(path)
    return PlotInfo(path, _panel_limits(axes.ravel()), fig)
