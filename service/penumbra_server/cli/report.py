"""`penumbra report`: turn a run's archive into PNG plots and a text summary.

Plots (matplotlib, Agg canvas, no display needed):

* ``areas_masses.png``: horizon area and irreducible mass of every surface against time;
* ``tracks.png``: area-weighted centroids in the orbital plane;
* ``cross_sections.png``: horizon cross-sections through their centres at chosen times,
  evaluated from the archived harmonic coefficients (:mod:`.cross_sections`);
* ``summary.txt``: the same numbers as text.

Surfaces labelled like a body of the run spec are individual horizons; any other label is a
surface the server looked for beyond the bodies (the common horizon of a merging pair).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from penumbra_server.cli.cross_sections import PLANES, cross_section
from penumbra_server.cli.progress import Progress

__all__ = [
    "RunRecord",
    "SurfaceSummary",
    "RunSummary",
    "ReportResult",
    "load_run",
    "summarise",
    "summary_text",
    "default_section_times",
    "write_report",
]

SLICE_OUTCOMES = {1: "processed", 2: "skipped", 3: "failed"}


@dataclass(frozen=True, eq=False)
class RunRecord:
    """What a report needs from one archive, as plain arrays (a consistent prefix of a live run).

    Attributes:
        path: the run's zarr group on disk.
        run_id, name, state: from the group attributes.
        body_labels: labels of the bodies in the run spec, in spec order.
        surfaces: label -> column name -> array (rows = attempts, see ARCHIVE layout in the README).
        slices: column name -> array (rows = slices whose fate is final).
        lmax: label -> harmonic degree of the coefficient column.
    """

    path: Path
    run_id: str
    name: str
    state: str
    body_labels: tuple[str, ...]
    surfaces: dict[str, dict[str, np.ndarray]]
    slices: dict[str, np.ndarray]
    lmax: dict[str, int]

    @property
    def labels(self) -> tuple[str, ...]:
        """Body labels first (spec order), then any other surface (e.g. the common horizon)."""
        others = sorted(l for l in self.surfaces if l not in self.body_labels)
        return tuple(l for l in self.body_labels if l in self.surfaces) + tuple(others)

    @property
    def merged_labels(self) -> tuple[str, ...]:
        return tuple(l for l in self.labels if l not in self.body_labels)


def _lmax_of(columns: dict[str, np.ndarray]) -> int:
    coefficients = columns.get("coefficients")
    if coefficients is None or coefficients.ndim != 2:
        return -1
    return int(round(math.sqrt(coefficients.shape[1]))) - 1


def load_run(path) -> RunRecord:
    """Read an archive (``<archive_root>/<run_id>.zarr``) through the archive reader."""
    from penumbra_server.archive import open_archive

    path = Path(path)
    if not path.exists():
        raise FileNotFoundError(f"archive: no such path {str(path)!r}; expected <archive_root>/<run_id>.zarr")
    view = open_archive(path)
    spec = view.run_spec or {}
    bodies = tuple(str(b["label"]) for b in spec.get("bodies", ()))
    surfaces = {label: {k: np.asarray(v) for k, v in view.surface(label).items()} for label in view.surface_labels}
    slices = {k: np.asarray(v) for k, v in view.slices().items()}
    attrs = dict(view.attrs)
    return RunRecord(
        path=path,
        run_id=str(view.run_id),
        name=str(attrs.get("name", "")),
        state=str(attrs.get("state", "")),
        body_labels=bodies,
        surfaces=surfaces,
        slices=slices,
        lmax={label: _lmax_of(cols) for label, cols in surfaces.items()},
    )


@dataclass(frozen=True)
class SurfaceSummary:
    """One surface over the run. Times in M, areas in M^2, masses in M; NaN/None if never found."""

    label: str
    attempts: int
    found: int
    first_found_time: float | None
    first_found_iteration: int | None
    last_found_time: float | None
    last_found_iteration: int | None
    final_area: float
    final_irreducible_mass: float
    final_centroid: tuple[float, float, float]
    final_residual_max: float
    median_wall_time_s: float


@dataclass(frozen=True)
class RunSummary:
    """The numbers a report states about a run."""

    run_id: str
    name: str
    state: str
    surfaces: tuple[SurfaceSummary, ...]
    merged_labels: tuple[str, ...]
    slices_total: int
    slices_processed: int
    slices_skipped: int
    slices_failed: int
    skipped_iterations: tuple[int, ...]
    median_latency_s: float
    common_first_time: float | None = None
    common_first_iteration: int | None = None
    common_label: str | None = None
    time_range: tuple[float, float] | None = None

    def surface(self, label: str) -> SurfaceSummary:
        for s in self.surfaces:
            if s.label == label:
                return s
        raise KeyError(f"label: no surface {label!r} in this run; have {[s.label for s in self.surfaces]}")


def _nan_median(values: np.ndarray) -> float:
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    return float(np.median(values)) if values.size else float("nan")


def _summarise_surface(label: str, cols: dict[str, np.ndarray]) -> SurfaceSummary:
    found = np.asarray(cols.get("found", np.zeros(0, bool)), dtype=bool)
    n = int(found.size)
    idx = np.flatnonzero(found)
    if idx.size:
        times = np.asarray(cols["time"], dtype=float)
        order = idx[np.argsort(times[idx], kind="stable")]
        first, last = int(order[0]), int(order[-1])
        return SurfaceSummary(
            label=label,
            attempts=n,
            found=int(idx.size),
            first_found_time=float(times[first]),
            first_found_iteration=int(cols["iteration"][first]),
            last_found_time=float(times[last]),
            last_found_iteration=int(cols["iteration"][last]),
            final_area=float(cols["area"][last]),
            final_irreducible_mass=float(cols["irreducible_mass"][last]),
            final_centroid=tuple(float(v) for v in np.asarray(cols["centroid"])[last]),
            final_residual_max=float(cols["residual_max"][last]),
            median_wall_time_s=_nan_median(np.asarray(cols["wall_time_s"])[idx]),
        )
    nan = float("nan")
    return SurfaceSummary(label, n, 0, None, None, None, None, nan, nan, (nan, nan, nan), nan,
                          _nan_median(np.asarray(cols.get("wall_time_s", []))))


def summarise(record: RunRecord) -> RunSummary:
    """Per-surface and per-slice figures of a run (pure function of the record)."""
    surfaces = tuple(_summarise_surface(label, record.surfaces[label]) for label in record.labels)
    outcome = np.asarray(record.slices.get("outcome", np.zeros(0, np.int8)))
    iterations = np.asarray(record.slices.get("iteration", np.zeros(0, np.int64)))
    times = np.asarray(record.slices.get("time", np.zeros(0)), dtype=float)
    common = [s for s in surfaces if s.label in record.merged_labels and s.first_found_time is not None]
    first_common = min(common, key=lambda s: s.first_found_time) if common else None
    return RunSummary(
        run_id=record.run_id,
        name=record.name,
        state=record.state,
        surfaces=surfaces,
        merged_labels=record.merged_labels,
        slices_total=int(outcome.size),
        slices_processed=int(np.sum(outcome == 1)),
        slices_skipped=int(np.sum(outcome == 2)),
        slices_failed=int(np.sum(outcome == 3)),
        skipped_iterations=tuple(int(i) for i in np.sort(iterations[outcome == 2])),
        median_latency_s=_nan_median(record.slices.get("latency_s", np.zeros(0))),
        common_first_time=None if first_common is None else first_common.first_found_time,
        common_first_iteration=None if first_common is None else first_common.first_found_iteration,
        common_label=None if first_common is None else first_common.label,
        time_range=(float(times.min()), float(times.max())) if times.size else None,
    )


def _fmt(value, spec: str = ".6f") -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return format(value, spec)


def summary_text(summary: RunSummary) -> str:
    """A plain-text account of the run (units: M for lengths, times and masses, M^2 for areas)."""
    lines = [
        f"run {summary.run_id}  name {summary.name!r}  state {summary.state}",
        f"slices: {summary.slices_total} final ({summary.slices_processed} processed, "
        f"{summary.slices_skipped} skipped, {summary.slices_failed} failed)"
        + (f"; time {summary.time_range[0]:.3f} .. {summary.time_range[1]:.3f} M" if summary.time_range else ""),
        f"median latency arrival -> last result: {_fmt(summary.median_latency_s, '.2f')} s",
    ]
    if summary.skipped_iterations:
        lines.append("skipped iterations: " + ", ".join(str(i) for i in summary.skipped_iterations))
    if summary.common_label is not None:
        lines.append(
            f"common horizon ({summary.common_label}) first found at t = {summary.common_first_time:.4f} M, "
            f"iteration {summary.common_first_iteration}"
        )
    elif summary.merged_labels:
        lines.append(f"common horizon: looked for ({', '.join(summary.merged_labels)}) but never found")
    else:
        lines.append("common horizon: not looked for in this run")
    lines.append("")
    header = (f"{'surface':<10} {'found':>9} {'first t':>9} {'last t':>9} {'area':>10} {'M_irr':>9} "
              f"{'centroid (x, y, z)':>29} {'|Theta|max':>10} {'wall s':>7}")
    lines.append(header)
    for s in summary.surfaces:
        centroid = "(" + ", ".join(_fmt(v, "+.4f") for v in s.final_centroid) + ")"
        lines.append(
            f"{s.label:<10} {f'{s.found}/{s.attempts}':>9} {_fmt(s.first_found_time, '.3f'):>9} "
            f"{_fmt(s.last_found_time, '.3f'):>9} {_fmt(s.final_area, '.5f'):>10} "
            f"{_fmt(s.final_irreducible_mass, '.5f'):>9} {centroid:>29} {_fmt(s.final_residual_max, '.1e'):>10} "
            f"{_fmt(s.median_wall_time_s, '.2f'):>7}"
        )
    lines.append("")
    lines.append("areas and masses: last found value of each surface; M_irr = sqrt(A / 16 pi).")
    return "\n".join(lines) + "\n"


def _found_rows(cols: dict[str, np.ndarray]) -> np.ndarray:
    found = np.asarray(cols.get("found", np.zeros(0, bool)), dtype=bool)
    idx = np.flatnonzero(found)
    return idx[np.argsort(np.asarray(cols["time"])[idx], kind="stable")] if idx.size else idx


def default_section_times(record: RunRecord, summary: RunSummary, *, count: int = 4) -> tuple[float, ...]:
    """Times worth a cross-section: first found, just before and at the common horizon, last."""
    found_times = sorted({float(t) for label in record.labels
                          for t in np.asarray(record.surfaces[label]["time"])[_found_rows(record.surfaces[label])]})
    if not found_times:
        return ()
    picks = [found_times[0]]
    if summary.common_first_time is not None:
        before = [t for t in found_times if t < summary.common_first_time]
        if before:
            picks.append(before[-1])
        picks.append(summary.common_first_time)
    picks.append(found_times[-1])
    if len(set(picks)) < count:
        # Fill with evenly spread times of the run.
        for t in np.linspace(found_times[0], found_times[-1], count + 2)[1:-1]:
            picks.append(min(found_times, key=lambda s: abs(s - t)))
            if len(set(picks)) >= count:
                break
    return tuple(sorted(set(picks)))[:max(count, 1)]


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


def plot_areas_masses(record: RunRecord, summary: RunSummary, path: Path) -> Path:
    fig, axes = _new_figure(7.5, 6.0, nrows=2)
    colours = _colours(record.labels)
    for label in record.labels:
        cols = record.surfaces[label]
        rows = _found_rows(cols)
        if not rows.size:
            continue
        t = np.asarray(cols["time"])[rows]
        axes[0, 0].plot(t, np.asarray(cols["area"])[rows], "o-", ms=3, color=colours[label], label=label)
        axes[1, 0].plot(t, np.asarray(cols["irreducible_mass"])[rows], "o-", ms=3, color=colours[label], label=label)
    for ax in axes[:, 0]:
        _mark_common(ax, summary)
        ax.grid(alpha=0.3)
    axes[0, 0].set_ylabel("area  [M$^2$]")
    axes[1, 0].set_ylabel("irreducible mass  [M]")
    axes[1, 0].set_xlabel("coordinate time  [M]")
    axes[0, 0].set_title(f"{record.name or record.run_id}: horizon areas and masses")
    if any(_found_rows(record.surfaces[l]).size for l in record.labels):
        axes[0, 0].legend(loc="best", fontsize="small")
    fig.savefig(path)
    return path


def plot_tracks(record: RunRecord, summary: RunSummary, path: Path, *, plane: str = "xy") -> Path:
    a, b = PLANES[plane][2]
    names = "xyz"
    fig, axes = _new_figure(6.5, 6.0)
    ax = axes[0, 0]
    colours = _colours(record.labels)
    for label in record.labels:
        cols = record.surfaces[label]
        rows = _found_rows(cols)
        if not rows.size:
            continue
        c = np.asarray(cols["centroid"])[rows]
        ax.plot(c[:, a], c[:, b], "o-", ms=3, color=colours[label], label=label)
        ax.plot(c[-1, a], c[-1, b], "s", ms=6, color=colours[label])
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel(f"{names[a]}  [M]")
    ax.set_ylabel(f"{names[b]}  [M]")
    ax.set_title(f"centroid tracks in the {plane} plane (square: last)")
    ax.grid(alpha=0.3)
    if any(_found_rows(record.surfaces[l]).size for l in record.labels):
        ax.legend(loc="best", fontsize="small")
    fig.savefig(path)
    return path


def plot_cross_sections(record: RunRecord, times, path: Path, *, plane: str = "xy") -> Path:
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
            rows = _found_rows(cols)
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
    return path


@dataclass(frozen=True)
class ReportResult:
    """Files a report wrote and the summary it computed."""

    output_dir: Path
    plots: tuple[Path, ...]
    summary_path: Path
    summary: RunSummary
    section_times: tuple[float, ...] = field(default_factory=tuple)


def _snap_times(record: RunRecord, times) -> tuple[float, ...]:
    """Each requested time moved to the nearest time at which some surface was found."""
    found = sorted({float(t) for label in record.labels
                    for t in np.asarray(record.surfaces[label]["time"])[_found_rows(record.surfaces[label])]})
    if not found:
        return ()
    return tuple(sorted({min(found, key=lambda s: abs(s - float(t))) for t in times}))


def write_report(archive_path, output_dir, *, times=None, plane: str = "xy", progress: Progress | None = None) -> ReportResult:
    """Read the archive, write the plots and ``summary.txt`` into ``output_dir``.

    Args:
        archive_path: ``<archive_root>/<run_id>.zarr``.
        output_dir: created if missing.
        times: coordinate times (M) for the cross-sections, each snapped to the nearest slice
            with a found surface; default :func:`default_section_times`.
        plane: orbital plane for tracks and cross-sections ("xy", "xz" or "yz").
    """
    if plane not in PLANES:
        raise ValueError(f"plane: expected one of {', '.join(PLANES)}, got {plane!r}")
    progress = progress or Progress("report", 5)
    output_dir = Path(output_dir)
    output_dir.mkdir(parents=True, exist_ok=True)
    record = load_run(archive_path)
    summary = summarise(record)
    progress.step(f"read {record.run_id}: {len(record.surfaces)} surfaces, {summary.slices_total} slices")
    section_times = _snap_times(record, times) if times else default_section_times(record, summary)
    plots = [plot_areas_masses(record, summary, output_dir / "areas_masses.png")]
    progress.step(plots[-1].name)
    plots.append(plot_tracks(record, summary, output_dir / "tracks.png", plane=plane))
    progress.step(plots[-1].name)
    plots.append(plot_cross_sections(record, section_times, output_dir / "cross_sections.png", plane=plane))
    progress.step(plots[-1].name)
    summary_path = output_dir / "summary.txt"
    summary_path.write_text(summary_text(summary))
    progress.step(summary_path.name)
    progress.finish(f"wrote {len(plots)} plots and a summary to {output_dir}")
    return ReportResult(output_dir, tuple(plots), summary_path, summary, section_times)
