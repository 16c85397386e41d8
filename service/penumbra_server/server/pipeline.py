"""Several slices of one run in flight: the loop that starts slices' finds and applies their
outcomes in iteration order.

A run's slices are taken from its queue in order. Up to ``depth`` of them are in flight at once:
their finds were started (planned from what the run knew at that moment: a slice whose
predecessor is still being searched is seeded from the tracks' forecast instead of that
predecessor's result) and their outcomes are not yet applied. Outcomes are applied strictly
oldest first, whatever order the finds finish in, so the decision state, the archive rows and the
events of a run advance in iteration order as with one slice at a time. Depth 1 is one slice at a
time.

Where the tracking order does not allow it, a search waits: while slices are in flight, a search
not seeded from a forecast with motion (a surface never found, such as a common horizon not yet
formed; one lost to a wide scan; one seeded where it last was, no motion known yet) and a search
inside a surface of its own slice (the inner common MOTS, seeded from its own previous solution)
are planned again once the slices before are applied (``InFlight.applied``) and start then, with
the seeds they would have with one slice at a time (a scan started early throws away what the
slice before may find; a static seed two slices old can be far off a moving hole). The slice's
other searches start at once. A slice with no search that may start early waits whole, so the
first slices of a run go one at a time. With more than one slice in flight the seeds of the
searches that start early (never the accepted surfaces, which meet the same tolerance) depend on
timing: the server's default is one slice at a time.

Plans are made on the event loop, never while a slice's outcomes are being applied (a deferred
search's only once every slice before it was applied, and no later slice is applied before it),
so the run's tracking state, which the apply step updates off the event loop, is never read
half-updated.
"""

from __future__ import annotations

import asyncio
from collections import deque
from dataclasses import dataclass, field
from typing import Awaitable, Callable

from .run_types import QueuedSlice
from .scheduler import SurfacePlan

__all__ = ["InFlight", "drive_pipeline", "may_overlap"]


#: Forecast models whose seed stays close when it extrapolates over the slices in flight too.
_MOVING_FORECASTS = ("polynomial", "orbit")


def may_overlap(plan: SurfacePlan) -> bool:
    """Whether ``plan`` may start before the slices in flight are applied: only a search seeded
    from a forecast with motion (not a scan, not a static seed from one known position, not a
    surface never found, such as a common horizon before it formed, whose search depends on
    the latest bodies); a forecast that extrapolates over two slices is still close."""
    return not plan.search or (plan.seed is not None and plan.seed_model in _MOVING_FORECASTS)


@dataclass(eq=False)
class InFlight:
    """One slice whose finds were started.

    Attributes:
        item: the slice.
        started: when its processing started (unix seconds).
        plans: the surfaces planned for it.
        finds: resolves to the outcomes, one per plan in order (or raises what planning or the
            search raised).
        applied: resolves once the outcomes were applied (or the apply failed): what a later
            slice's searches that need this slice's outcomes wait for.
    """

    item: QueuedSlice
    started: float
    plans: list
    finds: asyncio.Future
    applied: asyncio.Future = field(default_factory=lambda: asyncio.get_running_loop().create_future())


async def drive_pipeline(queue: deque, changed: asyncio.Event, flight: deque, *, depth: int,
                         closing: Callable[[], bool], launch: Callable[[QueuedSlice, bool], InFlight | None],
                         apply: Callable[[InFlight], Awaitable[None]]) -> None:
    """Run one run's slices until it is closing and nothing is queued or in flight.

    Args:
        queue: the run's queued slices (taken from the left).
        changed: set whenever a slice is queued or the run starts closing.
        flight: the slices in flight, oldest first (the caller's, so it can cancel them).
        depth: slices in flight at most (at least 1).
        closing: whether the run takes no more slices.
        launch: ``launch(item, overlapping)`` plans a slice and starts its finds (called on the
            loop, never during ``apply``); ``overlapping``: other slices are in flight. It returns
            None when the slice must wait for their outcomes (it is planned again after them).
        apply: record the oldest slice's outcomes once its finds are done.
    """
    if depth < 1:
        raise ValueError(f"depth: expected at least 1 slice in flight, got {depth}")
    while True:
        changed.clear()
        while queue and len(flight) < depth:
            item = queue.popleft()
            started = launch(item, bool(flight))
            if started is None:  # it needs the outcomes in flight: planned again once they are applied
                queue.appendleft(item)
                break
            flight.append(started)
        if not flight:
            if closing():
                return
            await changed.wait()
            continue
        head = flight[0]
        if len(flight) < depth and not closing():
            # Room for another slice: wake for a new one as well as for the oldest's outcomes.
            arrival = asyncio.ensure_future(changed.wait())
            try:
                await asyncio.wait((head.finds, arrival), return_when=asyncio.FIRST_COMPLETED)
            finally:
                arrival.cancel()
            if not head.finds.done():
                continue
        else:
            await asyncio.wait((head.finds,))
        flight.popleft()
        try:
            await apply(head)
        finally:
            if not head.applied.done():
                head.applied.set_result(None)
