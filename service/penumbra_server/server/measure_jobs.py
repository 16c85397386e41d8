"""A found surface's spin, stability and error bars as a worker job of their own.

A search that another search of the same slice waits for (the common horizon, inside which the
inner common MOTS is searched) is sent with ``SurfaceJob.measure_apart``: its outcome comes back
as soon as the surface is found, with the basic measures only, and the waiting search starts
then, while a :class:`MeasureJob` measures the rest on another worker. The outcome with both
parts is what a search of the whole job would have returned (the same numbers and notes: the
measurements are the same functions on the same cropped data; tested).

Worker side: :func:`~.jobs.run_surface_job` hands the job to :meth:`MeasureJob.run_in_worker`, as
for the formation searches, so any engine runs it.
"""

from __future__ import annotations

import dataclasses
import time
import traceback
from dataclasses import dataclass, field

from ..numerics.slices import Slice
from ..numerics.surfaces import Surface
from .jobs import SurfaceJob, SurfaceOutcome
from .quoted_quantities import quoted_measurements

__all__ = ["MeasureJob", "MeasuredQuantities", "measurement_job", "with_measurement"]


@dataclass(frozen=True, eq=False)
class MeasureJob:
    """The measurements of one found surface (picklable; runs in a worker).

    Attributes:
        label: the surface's label.
        data: the cropped slice the surface was found in (the find job's).
        surface: the surface at the degree it was solved at.
        interpolation_order: the find's interpolation order.

    Dispatched as any job of its slice (no search waits for it: not ``leads``).
    """

    label: str
    data: Slice
    surface: Surface
    interpolation_order: int

    def run_in_worker(self) -> "MeasuredQuantities":
        from ..numerics.sources import as_tracked_source

        start = time.perf_counter()
        try:
            # Measured on the data as the find's own geometry would (same nodes, same values).
            measured_in = as_tracked_source(self.data, order=self.interpolation_order)
            quantities, notes = quoted_measurements(self.surface, measured_in, self.data, self.interpolation_order)
        except Exception as exc:  # the surface stays found: say why it is not measured
            tail = traceback.format_exc(limit=3).strip().splitlines()[-1]
            quantities, notes = {}, [f"not measured: {type(exc).__name__}: {exc} ({tail})"]
        return MeasuredQuantities(self.label, quantities, notes, time.perf_counter() - start)


@dataclass(frozen=True)
class MeasuredQuantities:
    """What a :class:`MeasureJob` returns: the quantities (units as in SurfaceQuantities), the notes
    of the parts that could not be measured, the worker's seconds."""

    label: str
    quantities: dict = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    wall_time_s: float = 0.0


def measurement_job(job: SurfaceJob, outcome: SurfaceOutcome) -> SurfaceOutcome:
    """``outcome`` of ``job`` carrying the job that measures its surface (``outcome.measurement``)
    when it came back unmeasured; otherwise ``outcome`` as it is."""
    if not outcome.found or outcome.unmeasured is None:
        return outcome
    return dataclasses.replace(outcome, measurement=MeasureJob(job.label, job.data, outcome.unmeasured,
                                                               job.interpolation_order))


def with_measurement(outcome: SurfaceOutcome, measured) -> SurfaceOutcome:
    """``outcome`` completed by ``measured`` (a :class:`MeasuredQuantities`; anything else, such as
    the failed outcome of a lost worker, leaves the surface found with a note)."""
    if isinstance(measured, MeasuredQuantities):
        quantities, notes, seconds = {**outcome.quantities, **measured.quantities}, measured.notes, measured.wall_time_s
    else:
        quantities, seconds = outcome.quantities, float(getattr(measured, "wall_time_s", 0.0))
        notes = [f"not measured: {getattr(measured, 'message', type(measured).__name__)}"]
    message = "; ".join([outcome.message, *notes]) if notes else outcome.message
    return dataclasses.replace(outcome, quantities=quantities, message=message, wall_time_s=outcome.wall_time_s + seconds,
                               unmeasured=None, measurement=None)
