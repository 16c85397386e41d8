"""Spin in the report: ``spin.png`` (chi and the spin axis's angle from +z against time, per
surface) and the summary's lines of chi and the Christodoulou mass with error bars, plus the
remnant of the common surface (:func:`penumbra_server.tracking.remnant.remnant`).

Reads the archive's AKV spin columns; archives written before them have none and get no spin
lines or points (the plot says so)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from penumbra_server.cli.safe_text import terminal_safe

from .loading import ArchivedRun, found_rows
from .numbers import RunSummary

__all__ = ["spin_series", "plot_spin", "spin_lines"]


def spin_series(record: ArchivedRun, label: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(time (M), chi, angle of the spin direction from +z (radians)) of the found rows of
    ``label`` with a finite spin; empty arrays for archives without spin columns."""
    cols = record.surfaces[label]
    if "dimensionless_spin" not in cols or "spin_direction" not in cols:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    rows = found_rows(cols)
    chi = np.asarray(cols["dimensionless_spin"], dtype=float)[rows]
    direction = np.asarray(cols["spin_direction"], dtype=float)[rows].reshape(-1, 3)
    keep = np.isfinite(chi) & np.all(np.isfinite(direction), axis=1)
    # atan2 of the transverse length and z keeps precision near the axis (unlike arccos).
    angle = np.arctan2(np.linalg.norm(direction[:, :2], axis=1), direction[:, 2])
    return np.asarray(cols["time"], dtype=float)[rows][keep], chi[keep], angle[keep]


def _spin_errors(record: ArchivedRun, label: str) -> tuple[np.ndarray, np.ndarray]:
    """Error bars of chi and of the direction (radians; capped at pi) for the rows of
    :func:`spin_series`; NaN where the archive has none."""
    cols = record.surfaces[label]
    if "dimensionless_spin" not in cols or "spin_direction" not in cols:
        return np.zeros(0), np.zeros(0)
    rows = found_rows(cols)
    chi = np.asarray(cols["dimensionless_spin"], dtype=float)[rows]
    direction = np.asarray(cols["spin_direction"], dtype=float)[rows].reshape(-1, 3)
    keep = np.isfinite(chi) & np.all(np.isfinite(direction), axis=1)

    def column(name):
        return (np.asarray(cols[name], dtype=float)[rows][keep] if name in cols
                else np.full(int(keep.sum()), np.nan))

    return column("dimensionless_spin_error"), np.minimum(column("spin_direction_error"), np.pi)


def plot_spin(record: ArchivedRun, summary: RunSummary, path: Path):
    """chi (top) and the spin axis's angle from +z in radians (bottom) against time, one line per
    surface labelled with its label, shaded bands of the archived error bars; returns a
    :class:`~.plots.PlotInfo`."""
    from .plots import PlotInfo, _colours, _mark_common, _new_figure, _panel_limits

    fig, axes = _new_figure(7.5, 6.0, nrows=2)
    colours = _colours(record.labels)
    drawn = 0
    for label in record.labels:
        t, chi, angle = spin_series(record, label)
        if not t.size:
            continue
        drawn += 1
        axes[0, 0].plot(t, chi, "o-", ms=3, color=colours[label], label=label)
        axes[1, 0].plot(t, angle, "o-", ms=3, color=colours[label], label=label)
        chi_error, angle_error = _spin_errors(record, label)
        for ax, values, errors in ((axes[0, 0], chi, chi_error), (axes[1, 0], angle, angle_error)):
            if errors.shape == values.shape and np.any(np.isfinite(errors)):
                # Error bands (numerics/error_bars.py); a direction's error is an angle.
                ax.fill_between(t, values - errors, values + errors, color=colours[label], alpha=0.2, linewidth=0)
    for ax in axes[:, 0]:
        _mark_common(ax, summary)
        ax.grid(alpha=0.3)
    axes[0, 0].set_ylabel("dimensionless spin  chi")
    axes[1, 0].set_ylabel("spin axis from +z  [rad]")
    axes[1, 0].set_xlabel("coordinate time  [M]")
    title = f"{terminal_safe(record.name or record.run_id)}: horizon spins"
    axes[0, 0].set_title(title if drawn else title + " (no spin in this archive)")
    if drawn:
        axes[0, 0].legend(loc="best", fontsize="small")
    fig.savefig(path)
    return PlotInfo(path, _panel_limits(axes.ravel()), fig)


def _pm(value: float, error: float, spec: str) -> str:
    if not math.isfinite(value):
        return "-"
    return format(value, spec) + (f" +- {error:.1e}" if math.isfinite(error) else "")


def _last(cols, name: str, rows: np.ndarray) -> float:
    return float(np.asarray(cols[name], dtype=float)[rows][-1]) if name in cols and rows.size else math.nan


def spin_lines(record: ArchivedRun, summary: RunSummary) -> list[str]:
    """Summary lines: last found chi and M_chr (AKV) with errors per surface; the common
    surface's remnant (settled flag, values with errors) when it was found."""
    lines = ["", "spin (approximate Killing vector), last found value +- error:"]
    any_spin = False
    for label in record.labels:
        cols = record.surfaces[label]
        rows = found_rows(cols)
        chi, chi_err = _last(cols, "dimensionless_spin", rows), _last(cols, "dimensionless_spin_error", rows)
        mass, mass_err = _last(cols, "akv_christodoulou_mass", rows), _last(cols, "akv_christodoulou_mass_error", rows)
        any_spin |= math.isfinite(chi)
        lines.append(f"  {label:<10} chi {_pm(chi, chi_err, '.5f')}   M_chr {_pm(mass, mass_err, '.6f')} M")
    if not any_spin:
        lines.append("  (no spin columns or values in this archive)")
    common = summary.common_label
    if common is not None and common in record.surfaces:
        lines.append(_remnant_line(record.surfaces[common], common))
    return lines


def _remnant_line(cols, label: str) -> str:
    from penumbra_server.tracking.remnant import remnant_from_rows, remnant_line

    rows = found_rows(cols)
    names = ("irreducible_mass", "akv_christodoulou_mass", "dimensionless_spin", "akv_angular_momentum")
    if not rows.size or any(n not in cols or f"{n}_error" not in cols for n in names):
        return f"remnant ({label}): not assessed (no spin error bars in this archive)"
    get = lambda n: np.asarray(cols[n], dtype=float)[rows]  # noqa: E731
    try:
        r = remnant_from_rows(get("time"), get("irreducible_mass"), get("akv_christodoulou_mass"),
                              get("dimensionless_spin"), get("akv_angular_momentum"),
                              np.asarray(cols["spin_direction"], dtype=float)[rows].reshape(-1, 3),
                              {"irreducible_mass": get("irreducible_mass_error"),
                               "christodoulou_mass": get("akv_christodoulou_mass_error"),
                               "dimensionless_spin": get("dimensionless_spin_error"),
                               "angular_momentum": get("akv_angular_momentum_error")})
    except Exception as exc:  # the report must still be written
        return f"remnant ({label}): not assessed: {exc}"
    return remnant_line(r, label)
