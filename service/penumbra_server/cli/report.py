"""`penumbra report`: turn a run's archive into PNG plots and a text summary.

Plots (matplotlib, Agg canvas, no display needed):

* ``areas_masses.png``: horizon area and irreducible mass of every surface against time;
* ``tracks.png``: the server's tracks in the orbital plane (horizon centroids, and puncture
  positions integrated from the shift when the run sent one) with forecast cones: the
  forecast path issued after a few chosen slices, shaded out to its stated uncertainty;
  archives without tracking groups fall back to the surfaces' centroids;
* ``guidance.png``: the recommended finest refinement regions (sphere form as circles of their
  radius, box form dotted) over the tracks at a few chosen guidance updates, including the
  merged region of a pair and the single remnant region after merger;
* ``cross_sections.png``: horizon cross-sections through their centres at chosen times,
  evaluated from the archived harmonic coefficients (:mod:`.cross_sections`);
* ``summary.txt``: the same numbers as text, with the tracks, the forecasts' measured error
  against the later track, and the guidance (updates, when the regions merged, the final
  remnant region).

Surfaces labelled like a body of the run spec are individual horizons; any other label is a
surface the server looked for beyond the bodies (the common horizon of a merging pair).
Guidance is advisory: the report shows what the server recommended, not what a run did.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from penumbra_server.cli.cross_sections import PLANES, cross_section
from penumbra_server.cli.progress import Progress
from penumbra_server.cli.safe_text import terminal_safe

__all__ = [
    "RunRecord",
    "SurfaceSummary",
    "ForecastCheck",
    "TrackSummary",
    "BodyRegion",
    "GuidanceSummary",
    "RunSummary",
    "PlotInfo",
    "ReportResult",
    "SurfaceComparison",
    "load_run",
    "summarise",
    "summary_text",
    "default_section_times",
    "forecast_check",
    "guidance_updates",
    "compare_surfaces",
    "write_report",
]

SLICE_OUTCOMES = {1: "processed", 2: "skipped", 3: "failed"}
#: ``forecasts/<label>/model`` codes (archive layout FORECAST_MODELS).
FORECAST_MODEL_NAMES = {0: "none", 1: "static", 2: "polynomial", 3: "orbit"}
#: ``tracks/<label>/source`` codes (archive layout TRACK_SOURCES).
TRACK_SOURCE_HORIZON = 1
TRACK_SOURCE_PUNCTURE = 2


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
        tracks: label -> columns of ``tracks/<label>`` (horizon and puncture points, time order).
        forecasts: label -> columns of ``forecasts/<label>`` (one row per forecast issued).
        guidance: {"updates", "bodies", "regions"} -> columns (empty columns if none).
        events: columns of the archive's ``events`` group (tracking and guidance events).
        run_spec: the run spec as archived.
    """

    path: Path
    run_id: str
    name: str
    state: str
    body_labels: tuple[str, ...]
    surfaces: dict[str, dict[str, np.ndarray]]
    slices: dict[str, np.ndarray]
    lmax: dict[str, int]
    tracks: dict[str, dict[str, np.ndarray]] = field(default_factory=dict)
    forecasts: dict[str, dict[str, np.ndarray]] = field(default_factory=dict)
    guidance: dict[str, dict[str, np.ndarray]] = field(default_factory=dict)
    events: dict[str, np.ndarray] = field(default_factory=dict)
    run_spec: dict = field(default_factory=dict)

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

    def plain(columns):
        return {k: np.asarray(v) for k, v in columns.items()}

    return RunRecord(
        path=path,
        run_id=str(view.run_id),
        name=str(attrs.get("name", "")),
        state=str(attrs.get("state", "")),
        body_labels=bodies,
        surfaces=surfaces,
        slices=slices,
        lmax={label: _lmax_of(cols) for label, cols in surfaces.items()},
        tracks={label: plain(view.track(label)) for label in view.track_labels},
        forecasts={label: plain(view.forecasts(label)) for label in view.forecast_labels},
        guidance={part: plain(cols) for part, cols in view.guidance().items()},
        events=plain(view.tracking_events()),
        run_spec=dict(spec),
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
class ForecastCheck:
    """How one label's archived forecasts did against the track points that came later.

    Every forecast's path (positions at its leads, linear in between) is compared with each
    later horizon-track point inside its lead range. Lengths in M.

    Attributes:
        comparisons: forecast-versus-track comparisons made.
        median_error, max_error: distance between forecast and track position.
        with_uncertainty: comparisons whose forecast stated a finite uncertainty there.
        covered: of those, how many had the error within the stated uncertainty.
        by_model: (model name, comparisons, median error) per forecast model used.
    """

    comparisons: int
    median_error: float
    max_error: float
    with_uncertainty: int
    covered: int
    by_model: tuple[tuple[str, int, float], ...] = ()


@dataclass(frozen=True)
class TrackSummary:
    """One label's server track (``tracks/<label>``) and forecasts. Times and lengths in M.

    Attributes:
        label: surface label.
        horizon_points, puncture_points: track points by source.
        first_time, last_time: time span of the horizon points (None without any).
        final_position: last horizon-track position.
        puncture_order: highest global order of the puncture integration steps (0: none).
        puncture_final_uncertainty: stated error of the last puncture point.
        puncture_offset_max: largest distance between the puncture and the horizon centroid at
            the same iteration (NaN without puncture points).
        forecasts: forecasts issued; models: (model name, count) used.
        check: the forecasts against the later track (None with nothing to compare).
    """

    label: str
    horizon_points: int
    puncture_points: int
    first_time: float | None
    last_time: float | None
    final_position: tuple[float, float, float]
    puncture_order: int
    puncture_final_uncertainty: float
    puncture_offset_max: float
    forecasts: int
    models: tuple[tuple[str, int], ...]
    check: ForecastCheck | None


@dataclass(frozen=True, eq=False)
class BodyRegion:
    """The finest region recommended for one body (or the remnant) in one guidance update.

    Attributes:
        label: body label ("common" or the like after merger: the remnant).
        centre: (3,) sphere centre, M; radius: sphere radius, M.
        finest_level: the body's finest level (1 coarsest); spacing: its grid spacing, M.
        lower, upper: (3,) box form, M.
        region_bodies: the bodies the region on that level covers (more than one: merged).
    """

    label: str
    centre: np.ndarray
    radius: float
    finest_level: int
    spacing: float
    lower: np.ndarray
    upper: np.ndarray
    region_bodies: tuple[str, ...]

    @property
    def merged(self) -> bool:
        return len(self.region_bodies) > 1


@dataclass(frozen=True, eq=False)
class GuidanceUpdate:
    """One archived guidance: when, for how long, and each body's finest region (M)."""

    event_seq: int
    time: float
    iteration: int
    valid_from: float
    valid_until: float
    post_merger: bool
    levels: int
    bodies: tuple[BodyRegion, ...]

    @property
    def merged(self) -> bool:
        """Whether two or more bodies share one finest region (before merger)."""
        return not self.post_merger and any(b.merged for b in self.bodies)


@dataclass(frozen=True, eq=False)
class GuidanceSummary:
    """The refinement guidance over a run (advisory). Times in M.

    Attributes:
        updates: guidance updates archived; first_time, last_time: their span.
        merged_spans: (first, last) update times of each stretch in which two bodies' finest
            regions were one merged region, before merger.
        merged_first_iteration: iteration of the first such update (None if never).
        post_merger_time, post_merger_iteration: first update with a single region around the
            remnant (None if none).
        final: the last update.
    """

    updates: int
    first_time: float
    last_time: float
    merged_spans: tuple[tuple[float, float], ...]
    merged_first_iteration: int | None
    post_merger_time: float | None
    post_merger_iteration: int | None
    final: GuidanceUpdate


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
    tracks: tuple[TrackSummary, ...] = ()
    guidance: GuidanceSummary | None = None
    common_event_time: float | None = None
    common_event_iteration: int | None = None
    common_event_message: str = ""
    warnings: tuple[str, ...] = ()
    window_updates: int = 0

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
    kinds = np.asarray(record.events.get("kind", np.zeros(0, str))).astype(str)
    formed_rows = np.flatnonzero(kinds == "common_horizon_formed")
    formed = int(formed_rows[0]) if formed_rows.size else None
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
        tracks=tuple(_summarise_track(label, record) for label in _track_labels(record)),
        guidance=_summarise_guidance(guidance_updates(record)),
        common_event_time=None if formed is None else float(record.events["time"][formed]),
        common_event_iteration=None if formed is None else int(record.events["iteration"][formed]),
        common_event_message="" if formed is None else str(record.events["message"][formed]),
        warnings=tuple(str(m) for k, m in zip(kinds, record.events.get("message", ())) if k == "warning"),
        window_updates=int(np.sum(kinds == "data_windows_wanted")) if kinds.size else 0,
    )


def _track_labels(record: RunRecord) -> tuple[str, ...]:
    return tuple(l for l in record.labels if l in record.tracks) + tuple(
        sorted(l for l in record.tracks if l not in record.labels))


def forecast_check(forecasts: dict[str, np.ndarray], track: dict[str, np.ndarray]) -> ForecastCheck | None:
    """Compare each forecast (``forecasts/<label>`` columns) with the later horizon-track points.

    Pure function; None when no track point falls inside any forecast's lead range.
    """
    if not forecasts or not len(forecasts.get("time", ())):
        return None
    source = np.asarray(track.get("source", ()), dtype=int)
    keep = source == TRACK_SOURCE_HORIZON
    t_track = np.asarray(track.get("time", np.zeros(0)), dtype=float)[keep]
    p_track = np.asarray(track.get("position", np.zeros((0, 3))), dtype=float).reshape(-1, 3)[keep]
    errors, stated, models = [], [], []
    for row in range(len(forecasts["time"])):
        t0 = float(forecasts["time"][row])
        leads = np.asarray(forecasts["lead_time"][row], dtype=float)
        path = np.asarray(forecasts["position"][row], dtype=float)
        sigma = np.asarray(forecasts["uncertainty"][row], dtype=float)
        ok = np.isfinite(leads) & np.all(np.isfinite(path), axis=1)
        if np.count_nonzero(ok) < 2:
            continue
        leads, path, sigma = leads[ok], path[ok], sigma[ok]
        eps = 1e-9 * max(1.0, abs(leads[-1]))
        for t, actual in zip(t_track, p_track):
            if not (t0 + eps < t <= leads[-1] + eps):
                continue
            predicted = np.array([np.interp(t, leads, path[:, k]) for k in range(3)])
            j = int(np.clip(np.searchsorted(leads, t), 1, len(leads) - 1))
            bracket = sigma[j - 1:j + 1]
            errors.append(float(np.linalg.norm(predicted - actual)))
            stated.append(float(np.interp(t, leads, sigma)) if np.all(np.isfinite(bracket)) else math.inf)
            models.append(FORECAST_MODEL_NAMES.get(int(forecasts["model"][row]), "?"))
    if not errors:
        return None
    errors_a, stated_a, models_a = np.asarray(errors), np.asarray(stated), np.asarray(models)
    finite = np.isfinite(stated_a)
    by_model = tuple((m, int(np.sum(models_a == m)), float(np.median(errors_a[models_a == m])))
                     for m in FORECAST_MODEL_NAMES.values() if np.any(models_a == m))
    return ForecastCheck(comparisons=int(errors_a.size), median_error=float(np.median(errors_a)),
                         max_error=float(errors_a.max()), with_uncertainty=int(finite.sum()),
                         covered=int(np.sum(errors_a[finite] <= stated_a[finite])), by_model=by_model)


def _summarise_track(label: str, record: RunRecord) -> TrackSummary:
    cols = record.tracks.get(label, {})
    source = np.asarray(cols.get("source", np.zeros(0, int)), dtype=int)
    times = np.asarray(cols.get("time", np.zeros(0)), dtype=float)
    positions = np.asarray(cols.get("position", np.zeros((0, 3))), dtype=float).reshape(-1, 3)
    iterations = np.asarray(cols.get("iteration", np.zeros(0, int)))
    horizon, puncture = source == TRACK_SOURCE_HORIZON, source == TRACK_SOURCE_PUNCTURE
    offsets = []
    horizon_at = {int(i): p for i, p in zip(iterations[horizon], positions[horizon])}
    for i, p in zip(iterations[puncture], positions[puncture]):
        if int(i) in horizon_at:
            offsets.append(float(np.linalg.norm(p - horizon_at[int(i)])))
    forecasts = record.forecasts.get(label, {})
    model_codes = np.asarray(forecasts.get("model", np.zeros(0, int)), dtype=int)
    models = tuple((FORECAST_MODEL_NAMES.get(int(code), "?"), int(np.sum(model_codes == code)))
                   for code in sorted(set(model_codes.tolist())))
    nan = float("nan")
    return TrackSummary(
        label=label,
        horizon_points=int(horizon.sum()),
        puncture_points=int(puncture.sum()),
        first_time=float(times[horizon].min()) if horizon.any() else None,
        last_time=float(times[horizon].max()) if horizon.any() else None,
        final_position=tuple(float(v) for v in positions[horizon][-1]) if horizon.any() else (nan, nan, nan),
        puncture_order=int(np.max(np.asarray(cols["order"])[puncture])) if puncture.any() else 0,
        puncture_final_uncertainty=float(np.asarray(cols["uncertainty"])[puncture][-1]) if puncture.any() else nan,
        puncture_offset_max=max(offsets) if offsets else nan,
        forecasts=int(model_codes.size),
        models=models,
        check=forecast_check(forecasts, cols),
    )


def guidance_updates(record: RunRecord) -> tuple[GuidanceUpdate, ...]:
    """The archived guidance joined by update: each body's finest region (pure function)."""
    updates = record.guidance.get("updates") or {}
    bodies = record.guidance.get("bodies") or {}
    regions = record.guidance.get("regions") or {}
    if not len(updates.get("event_seq", ())):
        return ()
    region_seq = np.asarray(regions.get("event_seq", np.zeros(0, int)))
    body_seq = np.asarray(bodies.get("event_seq", np.zeros(0, int)))
    result = []
    for u in np.argsort(np.asarray(updates["time"], dtype=float), kind="stable"):
        seq = int(updates["event_seq"][u])
        entries = []
        for b in np.flatnonzero(body_seq == seq):
            label = str(bodies["label"][b])
            level = int(bodies["finest_level"][b])
            covering = [r for r in np.flatnonzero(region_seq == seq)
                        if int(regions["level"][r]) == level and label in str(regions["bodies"][r]).split("+")]
            if covering:
                r = covering[0]
                centre, radius = np.asarray(regions["centre"][r], float), float(regions["radius"][r])
                lower, upper = np.asarray(regions["lower"][r], float), np.asarray(regions["upper"][r], float)
                covered = tuple(str(regions["bodies"][r]).split("+"))
            else:  # no merged row: the body's own finest sphere and box
                centre, radius = np.asarray(bodies["centre"][b], float), float(bodies["finest_radius"][b])
                lower = np.asarray(bodies["finest_lower"][b], float)
                upper = np.asarray(bodies["finest_upper"][b], float)
                covered = (label,)
            entries.append(BodyRegion(label=label, centre=centre, radius=radius, finest_level=level,
                                      spacing=float(bodies["finest_spacing"][b]), lower=lower, upper=upper,
                                      region_bodies=covered))
        result.append(GuidanceUpdate(
            event_seq=seq, time=float(updates["time"][u]), iteration=int(updates["iteration"][u]),
            valid_from=float(updates["valid_from"][u]), valid_until=float(updates["valid_until"][u]),
            post_merger=bool(updates["post_merger"][u]), levels=int(updates["levels"][u]), bodies=tuple(entries)))
    return tuple(result)


def _summarise_guidance(updates: tuple[GuidanceUpdate, ...]) -> GuidanceSummary | None:
    if not updates:
        return None
    spans, start, previous = [], None, None
    for u in updates:
        if u.merged and start is None:
            start = u
        if not u.merged and start is not None:
            spans.append((start.time, previous.time))
            start = None
        previous = u
    if start is not None:
        spans.append((start.time, previous.time))
    first_merged = next((u for u in updates if u.merged), None)
    post = next((u for u in updates if u.post_merger), None)
    return GuidanceSummary(
        updates=len(updates), first_time=updates[0].time, last_time=updates[-1].time,
        merged_spans=tuple(spans), merged_first_iteration=None if first_merged is None else first_merged.iteration,
        post_merger_time=None if post is None else post.time,
        post_merger_iteration=None if post is None else post.iteration, final=updates[-1])


def _fmt(value, spec: str = ".6f") -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return format(value, spec)


def summary_text(summary: RunSummary) -> str:
    """A plain-text account of the run (units: M for lengths, times and masses, M^2 for areas)."""
    lines = [
        f"run {summary.run_id}  name {terminal_safe(summary.name)!r}  state {summary.state}",
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
    lines.extend(_tracking_lines(summary))
    # The run's display name comes from whoever opened it: nothing in it may drive a terminal.
    return "\n".join(terminal_safe(line) for line in lines) + "\n"


def _vec_text(values, spec: str = "+.3f") -> str:
    return "(" + ", ".join(_fmt(float(v), spec) for v in values) + ")"


def _tracking_lines(summary: RunSummary) -> list[str]:
    """The tracks, forecasts, common-horizon event and guidance, as text lines."""
    lines: list[str] = []
    if summary.tracks:
        lines += ["", "tracks (the server's; lengths and times in M):"]
        for t in summary.tracks:
            text = (f"  {t.label}: {t.horizon_points} horizon-centroid points"
                    + (f" (t = {t.first_time:.3f} .. {t.last_time:.3f})" if t.first_time is not None else ""))
            if t.puncture_points:
                text += (f"; {t.puncture_points} puncture points integrated from the shift (order {t.puncture_order}, "
                         f"stated error at the end {_fmt(t.puncture_final_uncertainty, '.2e')}, at most "
                         f"{_fmt(t.puncture_offset_max, '.4f')} from the centroid)")
            lines.append(text)
            if t.forecasts:
                models = ", ".join(f"{n} {m}" for m, n in t.models)
                text = f"    {t.forecasts} forecasts ({models})"
                if t.check is not None:
                    c = t.check
                    text += (f"; against the later track: median error {c.median_error:.2e}, max {c.max_error:.2e} "
                             f"over {c.comparisons} comparisons, within the stated uncertainty in "
                             f"{c.covered} of {c.with_uncertainty}")
                lines.append(text)
    if summary.common_event_time is not None:
        lines += ["", f"common horizon formed (server event) at t = {summary.common_event_time:.4f} M, iteration "
                      f"{summary.common_event_iteration}: {summary.common_event_message}"]
    g = summary.guidance
    if g is not None:
        lines += ["", f"refinement guidance (advisory: the evolution decides): {g.updates} updates, "
                      f"t = {g.first_time:.3f} .. {g.last_time:.3f} M, {g.final.levels} levels"]
        if g.merged_spans:
            spans = ", ".join(f"{a:.3f}" if a == b else f"{a:.3f}-{b:.3f}" for a, b in g.merged_spans)
            lines.append(f"  finest regions of the bodies merged into one region at t = {spans} M "
                         f"(first at iteration {g.merged_first_iteration})")
        else:
            lines.append("  finest regions of the bodies never merged before merger")
        if g.post_merger_time is not None:
            lines.append(f"  after merger: a single region around the remnant from t = {g.post_merger_time:.3f} M "
                         f"(iteration {g.post_merger_iteration})")
        f = g.final
        lines.append(f"  latest (t = {f.time:.3f} M, iteration {f.iteration}, valid {f.valid_from:.3f} .. "
                     f"{f.valid_until:.3f} M{', post-merger' if f.post_merger else ''}):")
        for b in f.bodies:
            kind = "remnant" if f.post_merger else ("merged region " + "+".join(b.region_bodies) if b.merged else "own region")
            lines.append(f"    {b.label}: finest level {b.finest_level} ({kind}), centre {_vec_text(b.centre)}, "
                         f"radius {b.radius:.4f}, spacing {b.spacing:.5f}, box {_vec_text(b.lower)} .. {_vec_text(b.upper)}")
    if summary.window_updates:
        lines += ["", f"data windows: {summary.window_updates} updates"]
    if summary.tracks or g is not None:
        lines.append(f"warnings: {len(summary.warnings)}" + ("" if not summary.warnings else
                     "; " + " | ".join(summary.warnings[:5]) + (" ..." if len(summary.warnings) > 5 else "")))
    return lines


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
    axes[0, 0].set_title(f"{terminal_safe(record.name or record.run_id)}: horizon areas and masses")
    if any(_found_rows(record.surfaces[l]).size for l in record.labels):
        axes[0, 0].legend(loc="best", fontsize="small")
    fig.savefig(path)
    return path


@dataclass(frozen=True)
class PlotInfo:
    """A written plot and the coordinate ranges its panels show: (x_min, x_max, y_min, y_max)
    per panel, in M (for time plots: time and value)."""

    path: Path
    limits: tuple[tuple[float, float, float, float], ...] = ()


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


def _track_points(record: RunRecord, label: str, source: int) -> tuple[np.ndarray, np.ndarray]:
    """(times, positions (n, 3)) of one label's track from one source; the surfaces' centroids
    when the archive has no tracking groups (archives written before the tracks existed)."""
    cols = record.tracks.get(label)
    if cols is not None and len(cols.get("time", ())):
        keep = np.asarray(cols["source"], dtype=int) == source
        return np.asarray(cols["time"], float)[keep], np.asarray(cols["position"], float).reshape(-1, 3)[keep]
    if source != TRACK_SOURCE_HORIZON or label not in record.surfaces:
        return np.zeros(0), np.zeros((0, 3))
    rows = _found_rows(record.surfaces[label])
    return (np.asarray(record.surfaces[label]["time"], float)[rows],
            np.asarray(record.surfaces[label]["centroid"], float).reshape(-1, 3)[rows])


def chosen_forecasts(record: RunRecord, *, count: int = 4) -> list[tuple[str, int]]:
    """(label, row) of the forecasts the tracks plot draws: those issued after up to ``count``
    slices spread over the run (every label's forecast made after that slice)."""
    times = sorted({float(t) for cols in record.forecasts.values() for t in np.asarray(cols.get("time", ()))})
    if not times or count < 1:
        return []
    picks = sorted({times[int(round(i))] for i in np.linspace(0, len(times) - 1, min(count, len(times)))})
    chosen = []
    for label in _track_labels(record) + tuple(l for l in record.forecasts if l not in record.tracks):
        cols = record.forecasts.get(label)
        if cols is None:
            continue
        for t in picks:
            rows = np.flatnonzero(np.isclose(np.asarray(cols["time"], float), t, rtol=0, atol=1e-9))
            if rows.size:
                chosen.append((label, int(rows[0])))
    return chosen


def plot_tracks(record: RunRecord, summary: RunSummary, path: Path, *, plane: str = "xy",
                forecast_count: int = 4) -> PlotInfo:
    """Tracks in the orbital plane, with forecast cones after ``forecast_count`` chosen slices."""
    a, b = PLANES[plane][2]
    names = "xyz"
    fig, axes = _new_figure(7.0, 6.6)
    ax = axes[0, 0]
    labels = _track_labels(record) if record.tracks else record.labels
    colours = _colours(record.labels + tuple(l for l in labels if l not in record.labels))
    extent = []  # every track and forecast-path point drawn, in plane coordinates
    drawn = False
    for label in labels:
        _, horizon = _track_points(record, label, TRACK_SOURCE_HORIZON)
        if len(horizon):
            ax.plot(horizon[:, a], horizon[:, b], "o-", ms=3, lw=1.2, color=colours[label], label=f"{label} horizon")
            ax.plot(horizon[-1, a], horizon[-1, b], "s", ms=6, color=colours[label])
            extent.append(horizon[:, [a, b]])
            drawn = True
        _, puncture = _track_points(record, label, TRACK_SOURCE_PUNCTURE)
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
    return PlotInfo(path, _panel_limits(axes.ravel()))


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


def plot_guidance(record: RunRecord, summary: RunSummary, path: Path, *, plane: str = "xy",
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
    labels = _track_labels(record) if record.tracks else record.labels
    colours = _colours(record.labels + tuple(l for l in labels if l not in record.labels))
    tracks = {label: (_track_points(record, label, TRACK_SOURCE_HORIZON)) for label in labels}
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
    return PlotInfo(path, _panel_limits(axes.ravel()) if picks else ())


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
    """Files a report wrote and the summary it computed.

    ``limits``: plot file name -> the coordinate ranges its panels show (see :class:`PlotInfo`).
    """

    output_dir: Path
    plots: tuple[Path, ...]
    summary_path: Path
    summary: RunSummary
    section_times: tuple[float, ...] = field(default_factory=tuple)
    limits: dict = field(default_factory=dict)


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
        plane: orbital plane for tracks, guidance and cross-sections ("xy", "xz" or "yz").
    """
    if plane not in PLANES:
        raise ValueError(f"plane: expected one of {', '.join(PLANES)}, got {plane!r}")
    progress = progress or Progress("report", 6)
    output_dir = Path(output_dir)
    output_dir.mkdir(parents=True, exist_ok=True)
    record = load_run(archive_path)
    summary = summarise(record)
    progress.step(f"read {record.run_id}: {len(record.surfaces)} surfaces, {summary.slices_total} slices, "
                  f"{len(record.tracks)} tracks")
    section_times = _snap_times(record, times) if times else default_section_times(record, summary)
    plots = [plot_areas_masses(record, summary, output_dir / "areas_masses.png")]
    limits = {}
    progress.step(plots[-1].name)
    for info in (plot_tracks(record, summary, output_dir / "tracks.png", plane=plane),
                 plot_guidance(record, summary, output_dir / "guidance.png", plane=plane)):
        plots.append(info.path)
        limits[info.path.name] = info.limits
        progress.step(info.path.name)
    plots.append(plot_cross_sections(record, section_times, output_dir / "cross_sections.png", plane=plane))
    progress.step(plots[-1].name)
    summary_path = output_dir / "summary.txt"
    summary_path.write_text(summary_text(summary))
    progress.step(summary_path.name)
    progress.finish(f"wrote {len(plots)} plots and a summary to {output_dir}")
    return ReportResult(output_dir, tuple(plots), summary_path, summary, section_times, limits)


@dataclass(frozen=True)
class SurfaceComparison:
    """Two runs of the same slices compared surface by surface (e.g. cropped sends against whole).

    Attributes:
        compared: (iteration, label) attempts present in both runs.
        only_in_one: attempts present in one run only (a slice skipped by one of them).
        same_outcome: attempts found in both or missed in both.
        found_in_both: attempts found in both.
        max_relative_area_difference: largest |A_1 / A_2 - 1| over those (NaN if none).
        max_coefficient_difference: largest |c_1 - c_2| over those, M (NaN if none).
        max_centroid_difference: largest centroid distance over those, M (NaN if none).
    """

    compared: int
    only_in_one: int
    same_outcome: int
    found_in_both: int
    max_relative_area_difference: float
    max_coefficient_difference: float
    max_centroid_difference: float

    @property
    def identical_outcomes(self) -> bool:
        return self.compared > 0 and self.same_outcome == self.compared


def compare_surfaces(first: RunRecord, second: RunRecord) -> SurfaceComparison:
    """Compare every surface attempt of two runs that share (iteration, label); pure function."""
    compared = only = same = both = 0
    area_diff, coeff_diff, centroid_diff = [], [], []
    for label in sorted(set(first.surfaces) | set(second.surfaces)):
        a, b = first.surfaces.get(label, {}), second.surfaces.get(label, {})
        rows_a = {int(i): r for r, i in enumerate(np.asarray(a.get("iteration", ())))}
        rows_b = {int(i): r for r, i in enumerate(np.asarray(b.get("iteration", ())))}
        only += len(set(rows_a) ^ set(rows_b))
        for iteration in sorted(set(rows_a) & set(rows_b)):
            ra, rb = rows_a[iteration], rows_b[iteration]
            fa, fb = bool(a["found"][ra]), bool(b["found"][rb])
            compared += 1
            same += int(fa == fb)
            if fa and fb:
                both += 1
                area_diff.append(abs(float(a["area"][ra]) / float(b["area"][rb]) - 1.0))
                ca, cb = np.asarray(a["coefficients"][ra], float), np.asarray(b["coefficients"][rb], float)
                if ca.shape == cb.shape:
                    coeff_diff.append(float(np.max(np.abs(ca - cb))))
                centroid_diff.append(float(np.linalg.norm(np.asarray(a["centroid"][ra], float)
                                                          - np.asarray(b["centroid"][rb], float))))
    nan = float("nan")
    return SurfaceComparison(compared=compared, only_in_one=only, same_outcome=same, found_in_both=both,
                             max_relative_area_difference=max(area_diff) if area_diff else nan,
                             max_coefficient_difference=max(coeff_diff) if coeff_diff else nan,
                             max_centroid_difference=max(centroid_diff) if centroid_diff else nan)
