"""Derived quantities of an archived run: per-surface and per-slice figures, tracks and their
forecasts checked against the later track, section times worth plotting, and two runs'
surfaces compared.

Pure functions of :class:`~.loading.ArchivedRun` records returning frozen dataclasses. Times
and lengths in M, areas in M^2, wall-clock figures in s.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .guidance import GuidanceSummary, guidance_updates, summarise_guidance
from .loading import (FORECAST_MODEL_NAMES, SLICE_OUTCOME_FAILED, SLICE_OUTCOME_PROCESSED, SLICE_OUTCOME_SKIPPED,
                      TRACK_SOURCE_HORIZON, TRACK_SOURCE_PUNCTURE, ArchivedRun, found_rows, track_labels)

__all__ = [
    "SurfaceSummary",
    "ForecastCheck",
    "TrackSummary",
    "RunSummary",
    "SurfaceComparison",
    "summarise",
    "forecast_check",
    "default_section_times",
    "snap_times",
    "compare_surfaces",
]


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


def summarise(record: ArchivedRun) -> RunSummary:
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
        slices_processed=int(np.sum(outcome == SLICE_OUTCOME_PROCESSED)),
        slices_skipped=int(np.sum(outcome == SLICE_OUTCOME_SKIPPED)),
        slices_failed=int(np.sum(outcome == SLICE_OUTCOME_FAILED)),
        skipped_iterations=tuple(int(i) for i in np.sort(iterations[outcome == SLICE_OUTCOME_SKIPPED])),
        median_latency_s=_nan_median(record.slices.get("latency_s", np.zeros(0))),
        common_first_time=None if first_common is None else first_common.first_found_time,
        common_first_iteration=None if first_common is None else first_common.first_found_iteration,
        common_label=None if first_common is None else first_common.label,
        time_range=(float(times.min()), float(times.max())) if times.size else None,
        tracks=tuple(_summarise_track(label, record) for label in track_labels(record)),
        guidance=summarise_guidance(guidance_updates(record)),
        common_event_time=None if formed is None else float(record.events["time"][formed]),
        common_event_iteration=None if formed is None else int(record.events["iteration"][formed]),
        common_event_message="" if formed is None else str(record.events["message"][formed]),
        warnings=tuple(str(m) for k, m in zip(kinds, record.events.get("message", ())) if k == "warning"),
        window_updates=int(np.sum(kinds == "data_windows_wanted")) if kinds.size else 0,
    )


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


def _summarise_track(label: str, record: ArchivedRun) -> TrackSummary:
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


def default_section_times(record: ArchivedRun, summary: RunSummary, *, count: int = 4) -> tuple[float, ...]:
    """Times worth a cross-section: first found, just before and at the common horizon, last."""
    found_times = sorted({float(t) for label in record.labels
                          for t in np.asarray(record.surfaces[label]["time"])[found_rows(record.surfaces[label])]})
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


def snap_times(record: ArchivedRun, times) -> tuple[float, ...]:
    """Each requested time moved to the nearest time at which some surface was found."""
    found = sorted({float(t) for label in record.labels
                    for t in np.asarray(record.surfaces[label]["time"])[found_rows(record.surfaces[label])]})
    if not found:
        return ()
    return tuple(sorted({min(found, key=lambda s: abs(s - float(t))) for t in times}))


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


def compare_surfaces(first: ArchivedRun, second: ArchivedRun) -> SurfaceComparison:
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
