"""What `penumbra watch` reads from a run's event stream: :class:`RunProgress` (newest slice
processed, recent skips and warnings, the common horizon's formation, the newest formation
forecast, the found surfaces kept for the remnant) and the readers that fill it from the log.
"""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["REMNANT_ROWS", "RunProgress", "read_progress", "find_common_formed"]

_NAN = float("nan")


#: Found rows of each surface the view keeps for the remnant (its window is the last 10 M).
REMNANT_ROWS = 400


@dataclass
class RunProgress:
    """What the event stream says about a run's progress (mutable; one writer thread)."""

    newest_time: float = _NAN
    newest_iteration: int = -1
    last_latency_s: float = _NAN
    last_seq: int = 0
    skips: list[str] = field(default_factory=list)
    #: The run's ``common_horizon_formed`` payload (a ``penumbra_shim.CommonHorizon``), once seen.
    common_formed: object | None = None
    warnings: list[str] = field(default_factory=list)
    #: The newest ``formation_forecast`` event (a ``penumbra_shim.FormationForecastEvent``).
    formation: object | None = None
    #: label -> the latest found ``SurfaceReport`` s, in event order (the last REMNANT_ROWS).
    found: dict = field(default_factory=dict)

    def absorb(self, event) -> None:
        """Update from one ``penumbra_shim.Event``."""
        self.last_seq = max(self.last_seq, int(getattr(event, "seq", 0)))
        kind = getattr(event, "kind", "")
        if kind == "surface_found" and getattr(event, "surface", None) is not None:
            series = self.found.setdefault(event.surface.label, [])
            series.append(event.surface)
            del series[:-REMNANT_ROWS]
        if kind == "common_horizon_formed" and getattr(event, "common", None) is not None:
            if self.common_formed is None:
                self.common_formed = event.common
        elif kind == "formation_forecast":
            if self.formation is None or int(getattr(event, "iteration", -1)) >= int(self.formation.iteration):
                self.formation = event
        elif kind == "warning":
            self.warnings.append(f"warning at iteration {getattr(event, 'iteration', -1)} "
                                 f"({getattr(event, 'label', '')}): {str(getattr(event, 'message', ''))[:160]}")
            del self.warnings[:-3]
        elif kind == "slice_parts_missing":
            self.warnings.append(f"parts missing at iteration {getattr(event, 'iteration', -1)}: "
                                 f"{str(getattr(event, 'message', ''))[:160]}")
        elif kind == "slice_rejected":
            self.warnings.append(f"slice refused at iteration {getattr(event, 'iteration', -1)} "
                                 f"({getattr(event, 'status_code', '')}): {str(getattr(event, 'message', ''))[:160]}")
            del self.warnings[:-3]
        elif kind == "client_gap_recorded" and getattr(event, "gap", None) is not None:
            gap = event.gap
            spans = ", ".join(f"{r.iteration_first}-{r.iteration_last} ({r.count}, {r.reason})" for r in gap.ranges)
            self.warnings.append(f"client link down {gap.end_unix_s - gap.start_unix_s:.1f} s, "
                                 f"{gap.slices_dropped} slices dropped: {spans or 'none'}")
            del self.warnings[:-3]
        if kind in ("slice_processed", "slice_skipped"):
            it = int(getattr(event, "iteration", -1))
            if it > self.newest_iteration and kind == "slice_processed":
                self.newest_iteration = it
                self.newest_time = float(getattr(event, "time", _NAN))
                self.last_latency_s = float(getattr(event, "latency_s", _NAN))
            if kind == "slice_skipped":
                skipped = getattr(event, "skipped_iteration", -1)
                skipped = it if skipped is None or int(skipped) < 0 else int(skipped)
                by = int(getattr(event, "superseded_by_iteration", -1))
                self.skips.append(f"skipped iteration {skipped}" + (f" (superseded by {by})" if by >= 0 else ""))
                del self.skips[:-5]


def read_progress(client, run_id: str, last_seq: int, *, window: int = 512, timeout_s: float = 5.0) -> RunProgress:
    """Read the tail of the run's event log (up to ``last_seq``) into a :class:`RunProgress`."""
    progress = RunProgress()
    if last_seq < 1:
        return progress
    stream = client.watch(run_id, from_seq=max(1, last_seq - window + 1), timeout_s=timeout_s)
    try:
        for event in stream:
            progress.absorb(event)
            if event.seq >= last_seq:
                break
    finally:
        stream.cancel()
    return progress


def find_common_formed(client, run_id: str, last_seq: int, *, timeout_s: float = 5.0):
    """Scan the run's events from the first up to ``last_seq`` for ``common_horizon_formed``;
    its ``CommonHorizon`` payload, or None (not formed, or not reached within ``timeout_s``)."""
    if last_seq < 1:
        return None
    stream = client.watch(run_id, from_seq=1, timeout_s=timeout_s)
    try:
        for event in stream:
            if event.kind == "common_horizon_formed" and event.common is not None:
                return event.common
            if event.seq >= last_seq:
                break
    finally:
        stream.cancel()
    return None
