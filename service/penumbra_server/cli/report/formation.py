"""The formation forecast in the report: ``formation.png`` (c_min with its error bars against
time, top; the formation time forecast after each search with its uncertainty, bottom; the time
the common horizon was first found marked in both) and the summary's lines.

Reads the archive's ``formation`` group (one row per constant-expansion search before the
common horizon formed); archives without it get an empty plot that says so and one line.
Units: times M, c_min 1/M.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from penumbra_server.cli.safe_text import terminal_safe

from .loading import ArchivedRun
from .numbers import RunSummary

__all__ = ["formation_rows", "plot_formation", "formation_lines"]


def formation_rows(record: ArchivedRun) -> dict[str, np.ndarray]:
    """Columns of the archive's ``formation`` group (empty dict when the archive has none)."""
    from penumbra_server.archive import open_archive

    try:
        cols = open_archive(record.path).formation()
    except (KeyError, FileNotFoundError):
        return {}
    return {k: np.asarray(v) for k, v in cols.items()} if len(cols.get("time", ())) else {}


def plot_formation(record: ArchivedRun, summary: RunSummary, path: Path):
    """c_min against time (top) and the forecast formation time against the time it was made
    (bottom); returns a :class:`~.plots.PlotInfo`."""
    from .plots import PlotInfo, _mark_common, _new_figure, _panel_limits

    fig, axes = _new_figure(7.5, 6.0, nrows=2)
    cols = formation_rows(record)
    top, bottom = axes[0, 0], axes[1, 0]
    if cols:
        t = cols["time"].astype(float)
        found = cols["c_min_found"].astype(bool)
        top.errorbar(t[found], cols["c_min"][found], yerr=cols["c_min_error"][found], fmt="o-", ms=3,
                     color="tab:purple", label="c_min")
        top.axhline(0.0, color="0.3", linewidth=0.8)
        ok = cols["forecast_available"].astype(bool)
        bottom.errorbar(t[ok], cols["formation_time"][ok], yerr=cols["formation_time_uncertainty"][ok], fmt="s",
                        ms=3, color="tab:green", label="forecast formation time")
        if ok.any():
            span = [float(t[ok].min()), float(max(t[ok].max(), np.nanmax(cols["formation_time"][ok])))]
            bottom.plot(span, span, color="0.6", linewidth=0.8, linestyle="--", label="t = time of forecast")
            bottom.legend(loc="best", fontsize="small")
    for ax in (top, bottom):
        _mark_common(ax, summary)
        ax.grid(alpha=0.3)
    if summary.common_first_time is not None:  # the forecasts aim at this line
        bottom.axhline(summary.common_first_time, color="0.5", linestyle=":", linewidth=1.0)
    top.set_ylabel("smallest enclosing expansion c_min  [1/M]")
    bottom.set_ylabel("forecast formation time  [M]")
    bottom.set_xlabel("coordinate time of the slice searched  [M]")
    title = f"{terminal_safe(record.name or record.run_id)}: when the common horizon forms"
    top.set_title(title if cols else title + " (no formation forecast in this archive)")
    fig.savefig(path)
    return PlotInfo(path, _panel_limits(axes.ravel()), fig)


def _fmt(value: float, error: float, spec: str) -> str:
    if not math.isfinite(value):
        return "-"
    return format(value, spec) + (f" +- {error:.2g}" if math.isfinite(error) else "")


def formation_lines(record: ArchivedRun, summary: RunSummary) -> list[str]:
    """Summary lines: the searches, the last c_min, the last forecast, and how it compares with
    the time the common horizon was first found."""
    cols = formation_rows(record)
    if not cols:
        return ["", "formation forecast: none in this archive"]
    t = cols["time"].astype(float)
    found = cols["c_min_found"].astype(bool)
    ok = cols["forecast_available"].astype(bool)
    lines = ["", f"formation forecast: {len(t)} constant-expansion searches from t = {t.min():.3f} to "
                 f"{t.max():.3f} M, c_min found in {int(found.sum())}"]
    for i in range(len(t)):
        c = _fmt(float(cols["c_min"][i]), float(cols["c_min_error"][i]), ".5f") if found[i] else "not found"
        f = (_fmt(float(cols["formation_time"][i]), float(cols["formation_time_uncertainty"][i]), ".3f") + " M"
             if ok[i] else "-")
        lines.append(f"  t = {t[i]:8.3f} M   c_min {c:<22} forecast {f}")
    if ok.any():
        last = int(np.flatnonzero(ok)[-1])
        when, err = float(cols["formation_time"][last]), float(cols["formation_time_uncertainty"][last])
        text = f"last forecast (made at t = {t[last]:.3f} M): formation at t = {when:.3f} +- {err:.3f} M"
        if summary.common_first_time is not None:
            text += f"; common horizon first found at t = {summary.common_first_time:.3f} M"
        lines.append("  " + text)
    return lines
