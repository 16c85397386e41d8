"""The report's figures: matplotlib on an Agg canvas (no display needed), one PNG each.

* ``areas_masses.png``: horizon area and irreducible mass of every surface against time;
* ``tracks.png``: the server's tracks in the orbital plane (horizon centroids, and puncture
  positions integrated from the shift when the run sent one) with forecast cones: the
  forecast path issued after a few chosen slices, shaded out to its stated uncertainty;
  archives without tracking groups fall back to the surfaces' centroids;
* ``guidance.png``: the recommended finest refinement regions (sphere form as circles of their
  radius, box form dotted) over the tracks at a few chosen guidance updates;
* ``cross_sections.png``: horizon cross-sections through their centres at chosen times,
  evaluated from the archived harmonic coefficients (:mod:`penumbra_server.cli.cross_sections`).

Every plot function returns a :class:`PlotInfo` holding the figure, so callers (and tests) can
read back what was drawn. Coordinates in M.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from penumbra_server.cli.cross_sections import PLANES, cross_section
from penumbra_server.cli.safe_text import terminal_safe

from .guidance import guidance_updates
from .loading import TRACK_SOURCE_HORIZON, TRACK_SOURCE_PUNCTURE, ArchivedRun, found_rows, track_labels, track_points
from .numbers import RunSummary

__all__ = [
    "PlotInfo",
    "chosen_forecasts",
    "cone_path",
    "default_guidance_choice",
    "plot_areas_masses",
    "plot_cross_sections",
    "plot_guidance",
    "plot_tracks",
]


@dataclass(frozen=True)
class PlotInfo:
    """A written plot, the coordinate ranges its panels show: (x_min, x_max, y_min, y_max) per
    visible panel, in M (for time plots: time and value), and the matplotlib ``Figure`` it was
    drawn on (its axes hold the plotted data, e.g. ``figure.axes[0].lines``)."""

    path: Path
    limits: tuple[tuple[float, float, float, float], ...] = ()
    figure: object = field(default=None, compare=False, repr=False)


def _colours(labels) -> dict[str, str]:
    palette = ["tab:blue", "tab:orange", "tab:red", "tab:green", "tab:purple", "tab:brown", "tab:gray"]
    return {label: palette[i % len(palette)] for i, label in enumerate(labels)}


def _new_figure(width: float, height: float, ncols: int = 1, nrows: int = 1):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=110, layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(nrows, ncols, squeeze=False)
    return fig, axes


def _mark_common(ax, summary: RunSummary) -> None:
    if summary.common_first_time is not None:
        ax.axvline(summary.common_first_time, color="0.5", linestyle=":", linewidth=1.0)


def plot_areas_masses(record: ArchivedRun, summary: RunSummary, path: Path) -> PlotInfo:
    """Area (top) and irreducible mass (bottom) of every found surface against time; one line
    per label (its label as the line's label) with a shaded band of its archived error bar, a
    dotted vertical line at the first common horizon."""
    fig, axes = _new_figure(7.5, 6.0, nrows=2)
    colours = _colours(record.labels)
    for label in record.labels:
        cols = record.surfaces[label]
        rows = found_rows(cols)
        if not rows.size:
            continue
        t = np.asarray(cols["time"])[rows]
        for ax, name in ((axes[0, 0], "area"), (axes[1, 0], "irreducible_mass")):
            values = np.asarray(cols[name], dtype=float)[rows]
            ax.plot(t, values, "o-", ms=3, color=colours[label], label=label)
            if f"{name}_error" in cols:
                # Shaded band of the archived error bar (numerics/error_bars.py), where there is one.
                errors = np.asarray(cols[f"{name}_error"], dtype=float)[rows]
                if np.any(np.isfinite(errors)):
                    errors = np.where(np.isfinite(errors), errors, 0.0)
                    ax.fill_between(t, values - errors, values + errors, color=colours[label], alpha=0.2,
                                    linewidth=0, label=f"_{label} error")
    for ax in axes[:, 0]:
        _mark_common(ax, summary)
        ax.grid(alpha=0.3)
    axes[0, 0].set_ylabel("area  [M$^2$]")
    axes[1, 0].set_ylabel("irreducible mass  [M]")
    axes[1, 0].set_xlabel("coordinate time  [M]")
    axes[0, 0].set_title(f"{terminal_safe(record.name or record.run_id)}: horizon areas and masses")
    if any(found_rows(record.surfaces[l]).size for l in record.labels):
        axes[0, 0].legend(loc="best", fontsize="small")
    fig.savefig(path)
    return PlotInfo(path, _panel_limits(axes.ravel()), fig)


def _panel_limits(axes) -> tuple[tuple[float, float, float, float], ...]:
    return tuple((*map(float, ax.get_xlim()), *map(float, ax.get_ylim())) for ax in axes if ax.get_visible())


def _square_limits(points: np.ndarray, *, pad: float = 0.0, min_half: float = 0.05) -> tuple[float, float, float, float]:
    """Equal-span limits holding every (u, v) point with ``pad`` (M) plus 6 % to spare."""
    pts = np.asarray(points, dtype=float).reshape(-1, 2)
    pts = pts[np.all(np.isfinite(pts), axis=1)]
    if not pts.size:
        return (-1.0, 1.0, -1.0, 1.0)
    lo, hi = pts.min(axis=0), pts.max(axis=0)
    centre = 0.5 * (lo + hi)
    half = max(0.5 * float(np.max(hi - lo)) + pad, min_half) * 1.06
    return (centre[0] - half, centre[0] + half, centre[1] - half, centre[1] + half)


def _circle(centre2, radius: float, samples: int = 72) -> np.ndarray:
    alpha = np.linspace(0.0, 2.0 * np.pi, samples, endpoint=False)
    return np.asarray(centre2, float) + radius * np.stack([np.cos(alpha), np.sin(alpha)], axis=1)


def _counter_clockwise(polygon: np.ndarray) -> np.ndarray:
    x, y = polygon[:, 0], polygon[:, 1]
    area = 0.5 * float(np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))
    return polygon if area >= 0 else polygon[::-1]


def cone_path(points2, radii):
    """A matplotlib Path of the union of discs of ``radii`` about ``points2`` ((k, 2), M) and the
    quadrilaterals joining neighbouring discs: the shaded forecast cone. Every piece is counter-
    clockwise, so the non-zero fill shades the union once. None when no radius is finite."""
    from matplotlib.path import Path as MplPath

    points2 = np.asarray(points2, float).reshape(-1, 2)
    radii = np.asarray(radii, float).reshape(-1)
    ok = np.isfinite(radii) & (radii > 0) & np.all(np.isfinite(points2), axis=1)
    pieces = [_counter_clockwise(_circle(points2[i], radii[i])) for i in np.flatnonzero(ok)]
    for i in range(len(points2) - 1):
        if not (ok[i] and ok[i + 1]):
            continue
        step = points2[i + 1] - points2[i]
        length = float(np.hypot(*step))
        if length == 0.0:
            continue
        normal = np.array([-step[1], step[0]]) / length
        quad = np.array([points2[i] + radii[i] * normal, points2[i] - radii[i] * normal,
                         points2[i + 1] - radii[i + 1] * normal, points2[i + 1] + radii[i + 1] * normal])
        pieces.append(_counter_clockwise(quad))
    if not pieces:
        return None
    vertices, codes = [], []
    for piece in pieces:
        vertices.extend(piece.tolist() + [piece[0].tolist()])
        codes.extend([MplPath.MOVETO] + [MplPath.LINETO] * (len(piece) - 1) + [MplPath.CLOSEPOLY])
    return MplPath(np.asarray(vertices), codes)


def chosen_forecasts(record: ArchivedRun, *, count: int = 4) -> list[tuple[str, int]]:
    """(label, row) of the forecasts the tracks plot draws: those issued after up to ``count``
    slices spread over the run (every label's forecast made after that slice)."""
    times = sorted({float(t) for cols in record.forecasts.values() for t in np.asarray(cols.get("time", ()))})
    if not times or count < 1:
        return []
    picks = sorted({times[int(round(i))] for i in np.linspace(0, len(times) - 1, min(count, len(times)))})
    chosen = []
    for label in track_labels(record) + tuple(l for l in record.forecasts if l not in record.tracks):
        cols = record.forecasts.get(label)
        if cols is None:
            continue
        for t in picks:
            rows = np.flatnonzero(np.isclose(np.asarray(cols["time"], float), t, rtol=0, atol=1e-9))
            if rows.size:
                chosen.append((label, int(rows[0])))
    return chosen


def plot_tracks(record: ArchivedRun, summary: RunSummary, path: Path, *, plane: str = "xy",
                forecast_count: int = 4) -> PlotInfo:
    """Tracks in the orbital plane, with forecast cones after ``forecast_count`` chosen slices."""
    a, b = PLANES[plane][2]
    names = "xyz"
    fig, axes = _new_figure(7.0, 6.6)
    ax = axes[0, 0]
    labels = track_labels(record) if record.tracks else record.labels
    colours = _colours(record.labels + tuple(l for l in labels if l not in record.labels))
    extent = []  # every track and forecast-path point drawn, in plane coordinates
    drawn = False
    for label in labels:
        _, horizon = track_points(record, label, TRACK_SOURCE_HORIZON)
        if len(horizon):
            ax.plot(horizon[:, a], horizon[:, b], "o-", ms=3, lw=1.2, color=colours[label], label=f"{label} horizon")
            ax.plot(horizon[-1, a], horizon[-1, b], "s", ms=6, color=colours[label])
            extent.append(horizon[:, [a, b]])
            drawn = True
        _, puncture = track_points(record, label, TRACK_SOURCE_PUNCTURE)
        if len(puncture):
            ax.plot(puncture[:, a], puncture[:, b], "x--", ms=4, lw=0.9, color=colours[label], alpha=0.8,
                    label=f"{label} puncture (shift)")
            extent.append(puncture[:, [a, b]])
            drawn = True
    from matplotlib.patches import PathPatch

    cone_radii = [0.0]
    chosen = chosen_forecasts(record, count=forecast_count)
    for k, (label, row) in enumerate(chosen):
        cols = record.forecasts[label]
        path3 = np.asarray(cols["position"][row], float).reshape(-1, 3)
        sigma = np.asarray(cols["uncertainty"][row], float)
        plane_path = path3[:, [a, b]]
        cone = cone_path(plane_path, sigma)
        colour = colours.get(label, "0.3")
        if cone is not None:
            ax.add_patch(PathPatch(cone, facecolor=colour, edgecolor="none", alpha=0.14))
            cone_radii.append(float(np.nanmax(np.where(np.isfinite(sigma), sigma, np.nan))))
        ax.plot(plane_path[:, 0], plane_path[:, 1], ":", lw=1.3, color=colour,
                label="forecast +- stated uncertainty" if k == 0 else None)
        ax.plot(plane_path[-1, 0], plane_path[-1, 1], ">", ms=4, color=colour)
        extent.append(plane_path)
    points = np.concatenate(extent) if extent else np.zeros((0, 2))
    span = float(np.max(np.ptp(points, axis=0))) if len(points) else 1.0
    # Cones show in full while they are small against the tracks; huge early cones are cut off.
    limits = _square_limits(points, pad=min(max(cone_radii), 0.3 * span))
    ax.set_xlim(limits[0], limits[1])
    ax.set_ylim(limits[2], limits[3])
    ax.set_aspect("equal", adjustable="box")
    ax.set_xlabel(f"{names[a]}  [M]")
    ax.set_ylabel(f"{names[b]}  [M]")
    times = sorted({float(record.forecasts[l]["time"][r]) for l, r in chosen})
    ax.set_title(f"tracks in the {plane} plane (square: last)"
                 + (f"\nforecasts issued at t = {', '.join(f'{t:.2f}' for t in times)} M" if times else ""),
                 fontsize="medium")
    ax.grid(alpha=0.3)
    if drawn:
        ax.legend(loc="best", fontsize="x-small")
    fig.savefig(path)
    return PlotInfo(path, _panel_limits(axes.ravel()), fig)


def default_guidance_choice(updates, *, count: int = 5) -> tuple[int, ...]:
    """Indexes of the guidance updates worth a panel, in this priority: the first, the first with
    merged finest regions, the last before merger, the first after merger, the last; filled with
    evenly spread updates up to ``count``. Sorted."""
    n = len(updates)
    if n == 0 or count < 1:
        return ()
    merged = [i for i, u in enumerate(updates) if u.merged]
    post = [i for i, u in enumerate(updates) if u.post_merger]
    priority = [0] + merged[:1] + ([post[0] - 1, post[0]] if post else []) + [n - 1]
    picks: list[int] = []
    for i in priority:
        if 0 <= i < n and i not in picks and len(picks) < count:
            picks.append(i)
    for i in np.linspace(0, n - 1, count + 2)[1:-1]:
        j = int(round(i))
        if len(picks) < count and j not in picks:
            picks.append(j)
    return tuple(sorted(picks))


def plot_guidance(record: ArchivedRun, summary: RunSummary, path: Path, *, plane: str = "xy",
                  choice=None) -> PlotInfo:
    """The finest recommended regions over the tracks at chosen guidance updates (one panel each).

    Sphere form: filled circle of the region's radius about its centre; box form: dotted
    rectangle. Regions covering more than one body (merged) are drawn in black. The tracks are
    drawn faint in full and solid up to each panel's time.
    """
    a, b = PLANES[plane][2]
    names = "xyz"
    updates = guidance_updates(record)
    picks = tuple(choice) if choice is not None else default_guidance_choice(updates)
    panels = max(len(picks), 1)
    ncols = min(panels, 5)
    nrows = int(math.ceil(panels / ncols))
    fig, axes = _new_figure(3.4 * ncols, 3.6 * nrows + 0.4, ncols=ncols, nrows=nrows)
    labels = track_labels(record) if record.tracks else record.labels
    colours = _colours(record.labels + tuple(l for l in labels if l not in record.labels))
    tracks = {label: (track_points(record, label, TRACK_SOURCE_HORIZON)) for label in labels}
    extent = [pos[:, [a, b]] for _, pos in tracks.values() if len(pos)]
    from matplotlib.patches import Circle, Rectangle

    for k, index in enumerate(picks):
        ax = axes[k // ncols, k % ncols]
        u = updates[index]
        for label, (times, pos) in tracks.items():
            if not len(pos):
                continue
            ax.plot(pos[:, a], pos[:, b], "-", lw=0.8, color=colours[label], alpha=0.3)
            upto = times <= u.time + 1e-9
            if upto.any():
                ax.plot(pos[upto, a], pos[upto, b], "-", lw=1.3, color=colours[label])
                ax.plot(pos[upto][-1, a], pos[upto][-1, b], "o", ms=4, color=colours[label])
        seen = set()
        for body in u.bodies:
            key = (body.region_bodies, body.finest_level)
            if key in seen:
                continue
            seen.add(key)
            colour = "black" if body.merged and not u.post_merger else colours.get(body.label, "0.3")
            name = "+".join(body.region_bodies)
            ax.add_patch(Circle((body.centre[a], body.centre[b]), body.radius, facecolor=colour, alpha=0.10,
                                edgecolor=colour, lw=1.4, label=f"{name}: level {body.finest_level}, r {body.radius:.2f}"))
            ax.add_patch(Rectangle((body.lower[a], body.lower[b]), body.upper[a] - body.lower[a],
                                   body.upper[b] - body.lower[b], fill=False, edgecolor=colour, lw=0.8, linestyle=":"))
            extent.append(np.array([[body.centre[a] - body.radius, body.centre[b] - body.radius],
                                    [body.centre[a] + body.radius, body.centre[b] + body.radius],
                                    [body.lower[a], body.lower[b]], [body.upper[a], body.upper[b]]]))
        state = "after merger: remnant" if u.post_merger else ("merged" if u.merged else "separate")
        ax.set_title(f"t = {u.time:.2f} M (it {u.iteration}), {state}\nvalid to {u.valid_until:.2f} M",
                     fontsize="small")
        ax.legend(loc="upper right", fontsize="xx-small")
        ax.grid(alpha=0.3)
        ax.set_xlabel(f"{names[a]}  [M]")
        ax.set_ylabel(f"{names[b]}  [M]")
    limits = _square_limits(np.concatenate(extent) if extent else np.zeros((0, 2)))
    for k in range(nrows * ncols):
        ax = axes[k // ncols, k % ncols]
        if k >= len(picks):
            ax.set_visible(k == 0)
            if k == 0:
                ax.set_title("no guidance in this archive")
            continue
        ax.set_xlim(limits[0], limits[1])
        ax.set_ylim(limits[2], limits[3])
        ax.set_aspect("equal", adjustable="box")
    fig.suptitle(f"recommended finest regions over the tracks ({plane} plane; advisory)")
    fig.savefig(path)
    return PlotInfo(path, _panel_limits(axes.ravel()) if picks else (), fig)


def plot_cross_sections(record: ArchivedRun, times, path: Path, *, plane: str = "xy") -> PlotInfo:
    """One panel per time: the cross-section through its centre of every surface found at that
    time (a closed line labelled with the surface's label), all panels on one scale."""
    times = tuple(times) or (float("nan"),)
    ncols = min(len(times), 4)
    nrows = int(math.ceil(len(times) / ncols))
    fig, axes = _new_figure(3.4 * ncols, 3.4 * nrows + 0.3, ncols=ncols, nrows=nrows)
    colours = _colours(record.labels)
    a, b = PLANES[plane][2]
    names = "xyz"
    bounds = []  # (u_min, u_max, v_min, v_max) of every drawn curve: one scale for all panels
    for k, wanted in enumerate(times):
        ax = axes[k // ncols, k % ncols]
        drawn_time = None
        for label in record.labels:
            cols = record.surfaces[label]
            rows = found_rows(cols)
            if not rows.size or not math.isfinite(wanted):
                continue
            t = np.asarray(cols["time"])[rows]
            nearest = int(rows[int(np.argmin(np.abs(t - wanted)))])
            # Only surfaces of the same slice as the requested time (within a small tolerance).
            if abs(float(cols["time"][nearest]) - wanted) > 1e-6 * max(1.0, abs(wanted)):
                continue
            section = cross_section(np.asarray(cols["centre"])[nearest], record.lmax[label],
                                    np.asarray(cols["coefficients"])[nearest], plane=plane)
            u, v = section.in_plane()
            ax.fill(u, v, color=colours[label], alpha=0.15)
            ax.plot(np.append(u, u[0]), np.append(v, v[0]), color=colours[label], lw=1.3, label=label)
            bounds.append((u.min(), u.max(), v.min(), v.max()))
            drawn_time = float(cols["time"][nearest])
        ax.grid(alpha=0.3)
        ax.set_xlabel(f"{names[a]}  [M]")
        ax.set_ylabel(f"{names[b]}  [M]")
        ax.set_title(f"t = {drawn_time:.3f} M" if drawn_time is not None else "no surface found")
        if drawn_time is not None:
            ax.legend(loc="upper right", fontsize="x-small")
    if bounds:
        box = np.asarray(bounds)
        centre_u, centre_v = 0.5 * (box[:, 0].min() + box[:, 1].max()), 0.5 * (box[:, 2].min() + box[:, 3].max())
        half = 0.55 * max(box[:, 1].max() - box[:, 0].min(), box[:, 3].max() - box[:, 2].min())
        for ax in axes.ravel():
            ax.set_xlim(centre_u - half, centre_u + half)
            ax.set_ylim(centre_v - half, centre_v + half)
            ax.set_aspect("equal", adjustable="box")
    for k in range(len(times), nrows * ncols):
        axes[k // ncols, k % ncols].set_visible(False)
    fig.suptitle(f"horizon cross-sections through their centres ({plane} plane)")
    fig.savefig(path)
    return PlotInfo(path, _panel_limits(axes.ravel()), fig)
