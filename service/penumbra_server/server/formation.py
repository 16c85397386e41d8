"""When will a pair's common horizon form? The server side of the formation forecast.

While the common-horizon watch is searching for a pair's common surface and it has not been
found yet, a :class:`FormationWatch` (a slice observer of the run) sends one constant-expansion
search (:func:`~penumbra_server.numerics.constant_expansion.smallest_enclosing_expansion`) to the
worker pool after a slice: about the watch's centre of the pair, marching in from the watch's
enclosing sphere. At most one search is in flight per run, and at most one per steering interval;
slices in between are not searched. Each search's c_min joins the run's history, from which
:func:`~penumbra_server.tracking.formation.forecast_formation` forecasts when c_min reaches zero.
The result goes out as a ``formation_forecast`` event (time and iteration of the slice searched)
and a row of the archive's ``formation`` group. The watch stops once the common horizon is found.

Worker side: :class:`FormationJob` runs through the same executor as the finder jobs
(:func:`~.jobs.run_surface_job` hands any job with a ``run_in_worker`` method to it).
Units: lengths and times M, expansions 1/M.
"""

from __future__ import annotations

import asyncio
import logging
import time
import traceback
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
from penumbra_shim._wire import horizons_pb2 as pb

from ..archive import _layout as layout
from ..numerics.slices import Slice
from ..tracking.formation import FormationForecast, forecast_formation
from .jobs import crop_slice
from .run_events import event_row
from .search import crop_ghost_nodes

if TYPE_CHECKING:
    from .runs import QueuedSlice, RunRecord

__all__ = ["FormationJob", "FormationOutcome", "FormationWatch", "run_formation_job", "FORMATION_LMAX_CAP"]

log = logging.getLogger(__name__)

#: Highest harmonic degree of the constant-expansion surfaces (c_min needs less than the common
#: horizon's shape: its error estimate compares l_max with l_max - 2; our choice).
FORMATION_LMAX_CAP = 10
#: The crop around the search: this multiple of the starting radius about the centre.
_CROP_FACTOR = 1.3


@dataclass(frozen=True, eq=False)
class FormationJob:
    """One constant-expansion search in one slice (picklable; runs in a worker).

    Attributes:
        label: the common surface's label.
        data: the slice cropped around the search.
        centre: (3,) expansion centre, M.
        start_radius: radius of the first (enclosing) coordinate sphere, M.
        lmax: harmonic degree of the surfaces.
        tolerance: max |Theta - c| of each solve, 1/M.
        interpolation_order: interpolation nodes per axis.
    """

    label: str
    data: Slice
    centre: np.ndarray
    start_radius: float
    lmax: int
    tolerance: float
    interpolation_order: int

    def run_in_worker(self) -> "FormationOutcome":
        return run_formation_job(self)


@dataclass(frozen=True)
class FormationOutcome:
    """What a worker returns (plain numbers). NaN where not found."""

    label: str
    found: bool
    c_min: float
    c_min_error: float
    mean_radius: float
    message: str
    wall_time_s: float


def run_formation_job(job: FormationJob) -> FormationOutcome:
    """The search of ``job``; never raises (an error becomes a not-found outcome)."""
    from ..numerics.constant_expansion import ConstantExpansionSettings, smallest_enclosing_expansion

    start = time.perf_counter()
    try:
        settings = ConstantExpansionSettings(lmax=job.lmax, tolerance=job.tolerance,
                                             interpolation_order=job.interpolation_order)
        result = smallest_enclosing_expansion(job.data, job.centre, job.start_radius, settings=settings)
        return FormationOutcome(job.label, result.found, result.c_min, result.c_min_error, result.mean_radius,
                                result.message, time.perf_counter() - start)
    except Exception as exc:  # a worker must report, not crash the pool
        tail = traceback.format_exc(limit=3).strip().splitlines()[-1]
        return FormationOutcome(job.label, False, float("nan"), float("nan"), float("nan"),
                                f"constant-expansion search raised {type(exc).__name__}: {exc} ({tail})",
                                time.perf_counter() - start)


@dataclass(eq=False)
class FormationWatch:
    """Slice observer of a pair's run (see the module docstring); its state is this run's alone.

    Attributes:
        history: (time, c_min, c_min_error) of the searches that found c_min, in time order.
        searches: searches sent so far.
        stopped: the common horizon was found; no more searches.
    """

    history: list[tuple[float, float, float]] = field(default_factory=list)
    searches: int = 0
    stopped: bool = False
    _in_flight: bool = False
    _last_search_time: float | None = None
    _tasks: set = field(default_factory=set)
    _published: list = field(default_factory=list)

    def __call__(self, run: "RunRecord", item: "QueuedSlice", outcomes) -> None:
        steering = run.steering
        if self.stopped or self._in_flight or steering.common_label is None:
            return
        if steering.common_formed is not None:
            self.stopped = True
            return
        t = float(item.slice_.time)
        advice = steering.advice_by_time.get(t)  # this slice's (a later slice may be planned already)
        if not steering.common_searching or advice is None:
            return
        interval = float(run.settings.refinement.steering_interval)
        if self._last_search_time is not None and t - self._last_search_time < interval * (1 - 1e-9):
            return
        centre, radius = np.asarray(advice.centre, float), float(advice.radius)
        reach = _CROP_FACTOR * radius
        order = run.options.interpolation_order
        data = crop_slice(item.slice_, centre - reach, centre + reach, ghost_nodes=crop_ghost_nodes(order))
        if data is None:
            return
        job = FormationJob(steering.common_label, data, centre, radius, min(run.settings.common_lmax, FORMATION_LMAX_CAP),
                           run.settings.tolerance, order)
        self._in_flight, self._last_search_time = True, t
        self.searches += 1
        task = asyncio.get_running_loop().create_task(self._search(run, item, job))
        self._tasks.add(task)
        task.add_done_callback(self._tasks.discard)

    def restore_event(self, event: pb.RunEvent) -> None:
        """Take back an archived ``formation_forecast`` event (a restarted server): its c_min
        joins the history and its slice counts as the last one searched."""
        f, t = event.formation_forecast, float(event.time_m)
        if f.c_min_found and np.isfinite(f.c_min_per_m) and all(t != h[0] for h in self.history):
            self.history.append((t, float(f.c_min_per_m), float(f.c_min_error_per_m)))
            self.history.sort()
        self.searches += 1
        self._last_search_time = t if self._last_search_time is None else max(self._last_search_time, t)

    async def drain(self) -> None:
        """Wait for the search in flight and its event's commit (the run is closing)."""
        while self._tasks:
            await asyncio.gather(*list(self._tasks), return_exceptions=True)
        for done in list(self._published):
            await asyncio.wait([done])
        self._published.clear()

    async def _search(self, run: "RunRecord", item: "QueuedSlice", job: FormationJob) -> None:
        try:
            result = await run.executor.run(job)
            if not isinstance(result, FormationOutcome):  # the executor's own failure (a dead worker)
                result = FormationOutcome(job.label, False, float("nan"), float("nan"), float("nan"),
                                          getattr(result, "message", str(result)), getattr(result, "wall_time_s", 0.0))
            t = float(item.slice_.time)
            if result.found and np.isfinite(result.c_min) and all(t != h[0] for h in self.history):
                self.history.append((t, result.c_min, result.c_min_error))
                self.history.sort()
            forecast = None
            if self.history:
                times, cs, errs = (np.array(v) for v in zip(*self.history))
                forecast = forecast_formation(times, cs, errs)
            payload = formation_message(job, result, forecast)
            done = run.publish(lambda event: event.formation_forecast.CopyFrom(payload), time_m=t,
                               iteration=item.iteration, rows=_rows(payload, item))
            self._published = [f for f in self._published if not f.done()] + [done]
        except Exception:  # the forecast must never take the run down
            log.exception("run %s: formation search of iteration %d failed", run.run_id, item.iteration)
        finally:
            self._in_flight = False


def formation_message(job: FormationJob, result: FormationOutcome, forecast: FormationForecast | None) -> pb.FormationForecast:
    """The event's payload from a search's outcome and the forecast made after it."""
    available = forecast is not None and forecast.available
    note = result.message if forecast is None else f"{result.message}; {forecast.reason}"
    return pb.FormationForecast(
        label=job.label, c_min_found=result.found, c_min_per_m=result.c_min, c_min_error_per_m=result.c_min_error,
        mean_radius_m=result.mean_radius, centre_m=pb.Vector3(x=job.centre[0], y=job.centre[1], z=job.centre[2]),
        forecast_available=available,
        formation_time_m=forecast.time if available else float("nan"),
        formation_time_uncertainty_m=forecast.uncertainty if available else float("nan"),
        based_on=forecast.based_on if forecast is not None else 0,
        message=note[:2000], wall_time_s=result.wall_time_s)


def _rows(payload: pb.FormationForecast, item: "QueuedSlice"):
    def rows(seq: int, now: float, event: pb.RunEvent) -> dict[str, list[dict]]:
        c = payload.centre_m
        row = {"iteration": item.iteration, "time": float(item.slice_.time), "c_min_found": payload.c_min_found,
               "c_min": payload.c_min_per_m, "c_min_error": payload.c_min_error_per_m,
               "mean_radius": payload.mean_radius_m, "centre": np.array([c.x, c.y, c.z]),
               "forecast_available": payload.forecast_available, "formation_time": payload.formation_time_m,
               "formation_time_uncertainty": payload.formation_time_uncertainty_m, "based_on": payload.based_on,
               "message": payload.message, "wall_time_s": payload.wall_time_s, "event_seq": seq}
        return {layout.FORMATION_GROUP: [row],
                layout.EVENTS_GROUP: [event_row(seq, now, event, "formation_forecast", payload.label, payload.message)]}

    return rows
