"""How a run processes its slices: plan each slice, start its finds (several slices in flight
with pipeline.py), apply the outcomes in iteration order to the decision state (surface states,
steering), hand the slice's events to the committer and call the slice observers.

Write-behind: a processed slice's commit is written while the next slice is processed, at most
``_COMMITS_BEHIND`` slices behind. A mixin of :class:`~penumbra_server.server.runs.RunRecord`
(its state is set up there).
"""

from __future__ import annotations

import asyncio
import dataclasses
import logging
import time

from penumbra_shim._wire import horizons_pb2 as pb

from ._tracking_convert import warning_notice
from .inner_planning import inner_common_plans, search_in_order
from .jobs import SurfaceOutcome
from .pipeline import InFlight, drive_pipeline, may_overlap
from .run_events import announced_view, notice_emission, slice_emission, surface_emission
from .run_types import QueuedSlice
from .scheduler import SurfacePlan
from .search import complete_measurement, search_plan
from .surface_state import SurfaceState, record_outcome

__all__ = ["RunProcessing"]

log = logging.getLogger("penumbra.server")


#: Processed slices whose commit may still be pending while the next slice is processed.
_COMMITS_BEHIND = 2


def _retrieve(future: asyncio.Future) -> None:
    """Mark a write-behind commit's outcome as seen (a failure is already logged and kept in
    the run's failed_reason by the committer)."""
    if not future.cancelled():
        future.exception()



class RunProcessing:
    """The processing side of a run (mixed into RunRecord)."""

    async def _processor(self) -> None:
        await drive_pipeline(self._queue, self._queue_changed, self._flight,
                             depth=max(1, self.options.slices_in_flight), closing=lambda: self._closing,
                             launch=self._launch, apply=self._apply_or_fail)

    def _launch(self, item: QueuedSlice, overlapping: bool) -> InFlight | None:
        """Plan ``item`` from what the decision state knows now and start its finds. With slices
        still in flight (``overlapping``) the searches seeded from a forecast with motion start now
        (:func:`~.pipeline.may_overlap`); the others (and those inside a surface of this slice)
        are planned again once those slices are applied (:meth:`_replanned`). None when no search
        could start now: the slice is launched again after them."""
        started = time.time()
        try:
            plans = list(self.planner.plan(self.settings, self.tracks, item.slice_))
            plans += inner_common_plans(self.settings, plans, self.steering.common_label, self.states, self.displaced)
        except Exception as exc:  # reported in order, when this slice's turn comes
            if overlapping:
                return None
            failed = asyncio.get_running_loop().create_future()
            failed.set_exception(exc)
            return InFlight(item, started, [], failed)
        deferred = frozenset(index for index, plan in enumerate(plans)
                             if overlapping and (plan.inside_of is not None or not may_overlap(plan)))
        if overlapping and not any(plan.search for index, plan in enumerate(plans) if index not in deferred):
            return None
        earlier = [flight.applied for flight in self._flight]
        additions = []
        for plan in plans:
            if plan.label not in self.surface_labels:  # a surface the planner added (e.g. a common horizon)
                adding = self._adding.get(plan.label)
                if adding is None:
                    adding = self._adding[plan.label] = asyncio.ensure_future(self._add_surface(plan))
                additions.append(adding)
        return InFlight(item, started, plans,
                        asyncio.ensure_future(self._search(item, plans, additions, earlier, deferred)))

    async def _add_surface(self, plan: SurfacePlan) -> None:
        try:
            await self._in_archive_thread(self.writer.add_surface, plan.label, lmax=plan.lmax or self.settings.lmax)
            self.surface_labels.append(plan.label)
            self.states.setdefault(plan.label, SurfaceState(plan.label))
        finally:
            self._adding.pop(plan.label, None)

    async def _search(self, item: QueuedSlice, plans: list[SurfacePlan], additions: list,
                      earlier: list[asyncio.Future], deferred: frozenset[int]) -> list[SurfaceOutcome]:
        for adding in additions:  # its rows need the surface's archive group
            await adding
        # Searches inside a surface of this slice (the inner common MOTS) wait for that surface.
        return await search_in_order(plans, lambda plan: self._attempt(plan, item), self.displaced, deferred=deferred,
                                     replan=lambda: self._replanned(item, plans, earlier, deferred),
                                     measure=lambda outcome: complete_measurement(outcome, self.executor))

    async def _replanned(self, item: QueuedSlice, plans: list[SurfacePlan], earlier: list[asyncio.Future],
                         deferred: frozenset[int]) -> list[SurfacePlan]:
        """``plans`` (the flight's list, updated in place: the apply step records what was searched)
        with those at ``deferred`` planned again once the slices launched before this one are
        applied: seeded from their outcomes, as with one slice at a time. A surface the fresh plan
        no longer holds is reported not searched."""
        await asyncio.wait(earlier)
        fresh = {plan.label: plan for plan in self.planner.plan(self.settings, self.tracks, item.slice_)}
        outer = [fresh.get(plan.label, plan) if index in deferred else plan
                 for index, plan in enumerate(plans) if plan.inside_of is None]
        fresh.update({plan.label: plan for plan in inner_common_plans(self.settings, outer, self.steering.common_label,
                                                                      self.states, self.displaced)})
        for index in deferred:
            plans[index] = fresh.get(plans[index].label) or dataclasses.replace(
                plans[index], search=False, note="not searched: no longer planned once the slices before were applied")
        return plans

    async def _apply_or_fail(self, flight: InFlight) -> None:
        try:
            await self._apply(flight)
        except asyncio.CancelledError:
            raise
        except Exception as exc:  # a bug in planning must not stop the run; the slice is marked failed
            log.exception("run %s: processing iteration %d failed", self.run_id, flight.item.iteration)
            await self._emit(slice_emission(self, flight.item, attempted=0, found=0, started=flight.started,
                                            error=f"{type(exc).__name__}: {exc}"))

    async def _apply(self, flight: InFlight) -> None:
        """Record the outcomes of the oldest slice in flight (iteration order), observe, commit."""
        item, started, plans = flight.item, flight.started, flight.plans
        outcomes = await flight.finds
        # The decision state (what the next plan and the steering see) takes the outcomes now;
        # what GetLatestSurfaces shows moves only when the slice's commit is written.
        surface_units = []
        for plan, outcome in zip(plans, outcomes):
            state = self.states[outcome.label]
            self.announced.setdefault(outcome.label, announced_view(state))
            record_outcome(state, outcome, time=item.slice_.time, iteration=item.iteration)
            surface_units.append(surface_emission(self, item, outcome, plan, view=announced_view(state)))
        searched = [o for o, plan in zip(outcomes, plans) if plan.search]
        found = sum(1 for o in searched if o.found)
        try:
            # Fits and interpolation of the shift: off the event loop (the state is this run's alone).
            notices = await asyncio.to_thread(self.steering.observe, item.slice_, plans, outcomes)
        except Exception as exc:  # tracking must not stop the run; say so instead
            log.exception("run %s: tracking iteration %d failed", self.run_id, item.iteration)
            text = f"tracking and guidance not updated for iteration {item.iteration}: {type(exc).__name__}: {exc}"
            notices = [warning_notice(pb.RunWarning.KIND_TRACKING, "", text)]
        # Every row of the slice goes to the committer at once (no await in between): one
        # archive commit per slice, its events announced together after it is written.
        for unit in surface_units:
            self._submit(unit)
        for notice in notices:
            self._submit(notice_emission(self, item, notice))
        # Write-behind: the next slice's plan needs only the decision state (updated above), so
        # the processor goes on while this commit is written; its events are announced after it,
        # in order. At most _COMMITS_BEHIND slices wait for their commit (bounded memory).
        done = self._submit(slice_emission(self, item, attempted=len(searched), found=found, started=started)).done
        done.add_done_callback(_retrieve)
        self._behind.append(done)
        while len(self._behind) > _COMMITS_BEHIND or (self._behind and self._behind[0].done()):
            oldest = self._behind.popleft()
            await asyncio.wait([oldest])
        for observer in self.slice_observers:
            try:
                observer(self, item, list(outcomes))
            except Exception:
                log.exception("run %s: slice observer failed", self.run_id)

    async def _attempt(self, plan: SurfacePlan, item: QueuedSlice) -> SurfaceOutcome:
        # A search another waits for comes back before its measurements (search_in_order runs them).
        return await search_plan(plan, item.slice_, executor=self.executor, settings=self.settings,
                                 interpolation_order=self.options.interpolation_order, measure_apart=plan.leads)
