"""The sending half of a run handle: ``submit()`` queues, one sender thread per handle sends.

:class:`RunSender` is mixed into :class:`~penumbra_shim._run_handle.RunHandle`, which owns the
state it uses (queue, condition, ledger, stats, client) and opens the run (``_establish``). The
caller's thread never waits on the network in ``submit()``: the queue keeps the newest
``queue_depth`` slices (keep-newest; a dropped slice is counted with its reason), and the sender
streams each slice in chunks, cropped to the server's data windows when asked, retrying only
what is safe (SendSlice is idempotent by run and iteration, and part).
"""

from __future__ import annotations

import concurrent.futures
import time
from collections import deque
from dataclasses import dataclass

import grpc

from ._errors import PenumbraError, error_from_rpc
from ._wire import horizons_pb2 as pb
from ._guidance_types import DataWindows
from ._results import SliceAck
from ._slices import OutgoingSlice, build_slice, crop_outgoing_slice
from ._wire import horizons_pb2 as pb
from .cropping import worth_cropping

__all__ = ["RunSender", "SubmitTicket", "SenderStats", "RETRYABLE_SEND"]

#: Status codes after which a SendSlice (idempotent) or RecordClientGap is tried again.
RETRYABLE_SEND = frozenset({
    grpc.StatusCode.UNAVAILABLE,
    grpc.StatusCode.DEADLINE_EXCEEDED,
    grpc.StatusCode.ABORTED,
    grpc.StatusCode.CANCELLED,
})
# SendSlice deadline: a base plus the time the bytes need at a pessimistic 20 MB/s.
_SEND_BYTES_PER_S = 20e6


class SubmitTicket:
    """The fate of one submitted slice: :meth:`result` gives its :class:`SliceAck` or raises."""

    def __init__(self, iteration: int, nbytes: int, part_index: int = 0) -> None:
        self.iteration = iteration
        self.part_index = part_index
        self.nbytes = nbytes
        self.submit_block_s = 0.0
        self._future: concurrent.futures.Future = concurrent.futures.Future()

    def done(self) -> bool:
        return self._future.done()

    def result(self, timeout_s: float | None = None) -> SliceAck:
        """The acknowledgement; raises :class:`PenumbraError` if the server refused the slice."""
        return self._future.result(timeout_s)

    def exception(self, timeout_s: float | None = None) -> BaseException | None:
        return self._future.exception(timeout_s)

    def _resolve(self, ack: SliceAck) -> None:
        if not self._future.done():
            self._future.set_result(ack)

    def _fail(self, error: BaseException) -> None:
        if not self._future.done():
            self._future.set_exception(error)


@dataclass
class SenderStats:
    """Counters of one run handle's sender (read them any time)."""

    submitted: int = 0
    sent: int = 0
    duplicates: int = 0
    dropped_locally: int = 0
    refused: int = 0
    retries: int = 0
    #: Retries not needed: after the link broke mid-upload, the server already held the slice
    #: (it reached the server's spool before the answer was lost).
    held_by_server: int = 0
    bytes_sent: int = 0
    send_seconds: float = 0.0
    #: Slices sent cropped to the server's data windows, and what they would have cost whole.
    cropped: int = 0
    bytes_uncropped: int = 0
    #: Slices that asked for cropping but went whole (no windows yet, expired windows without a
    #: speed bound, grown windows keeping nearly everything, or windows that miss every patch).
    sent_whole: int = 0
    #: Of ``cropped``: slices later than their windows' validity, cropped to the windows grown by
    #: the server's speed bound times the lag (the server lagged behind the evolution).
    grown: int = 0
    #: Of ``sent_whole``: no windows held yet; grown windows that would keep nearly all the bytes.
    whole_without_windows: int = 0
    whole_nearly_all: int = 0
    #: Slices the server said it would only skip (asked before the upload): dropped, never sent.
    server_busy: int = 0


@dataclass(eq=False)
class _Pending:
    slice_: OutgoingSlice
    ticket: SubmitTicket
    crop: bool = False
    order: int = 0  # submission order within the handle (dropped ranges are runs of it)


class RunSender:
    """Queueing and sending of slices (mixed into RunHandle; see the module docstring)."""

    def _drop(self, pending: _Pending, reason: str | None = None, *, attempts: int = 0) -> None:
        """Count a slice the server will never receive, with its reason, and resolve its ticket."""
        drop = self._ledger.drop(pending.slice_.iteration, pending.slice_.time, pending.order, reason,
                                 link_pending=self._state == "pending")
        with self._cond:
            self.stats.dropped_locally += 1
        pending.ticket._resolve(SliceAck(iteration=pending.slice_.iteration, accepted=False, skipped_locally=True,
                                         part_index=pending.slice_.part_index,
                                         parts_expected=pending.slice_.part_count, attempts=attempts,
                                         drop_reason=drop.reason_text))

    def submit(self, slice_: OutgoingSlice, *, crop_to_windows: bool | None = None) -> SubmitTicket:
        """Queue a built slice for the background sender and return at once.

        If ``queue_depth`` slices are already waiting, the oldest waiting one is dropped
        (its ticket resolves with ``skipped_locally=True`` and its ``drop_reason``): the
        evolution never waits, also while the run is pending or the server unreachable. A slice
        (or part) waiting with the same iteration and part index is replaced by this one.

        ``crop_to_windows`` (default: the handle's option): the sender cuts every patch to the
        data windows the server asked for last (plus their stencil nodes) just before sending;
        a slice outside the windows' validity, or before any windows, goes whole.
        """
        start = time.perf_counter()
        if not isinstance(slice_, OutgoingSlice):
            raise TypeError(f"slice_: expected the OutgoingSlice returned by build_slice(), got {type(slice_).__name__}")
        if self.variable_set is not None and slice_.variable_set != self.variable_set:
            raise ValueError(
                f"slice_.variable_set: {slice_.variable_set!r} does not match the run's variable set {self.variable_set!r}"
            )
        ticket = SubmitTicket(slice_.iteration, slice_.nbytes, slice_.part_index)
        dropped: list[_Pending] = []
        key = (slice_.iteration, slice_.part_index)
        with self._cond:
            if self._closed:
                raise RuntimeError(f"run handle {self.run_id} is closed")
            for waiting in [w for w in self._queue if (w.slice_.iteration, w.slice_.part_index) == key]:
                self._queue.remove(waiting)
                dropped.append(waiting)
            while len(self._queue) >= self.queue_depth:
                dropped.append(self._queue.popleft())
            crop = self.crop_to_windows if crop_to_windows is None else bool(crop_to_windows)
            self._queue.append(_Pending(slice_, ticket, crop, order=self.stats.submitted))
            self.stats.submitted += 1
            self._cond.notify_all()
        for old in dropped:
            self._drop(old)
        ticket.submit_block_s = time.perf_counter() - start
        return ticket

    def submit_arrays(self, *, time: float, iteration: int, patches, check_finite: bool = True,
                      crop_to_windows: bool | None = None, part_index: int = 0, part_count: int = 1) -> SubmitTicket:
        """:func:`build_slice` (validation + defensive copy) in the run's variable set, then :meth:`submit`.

        On MPI ranks: every rank passes its own boxes (possibly none) with ``part_index`` = its rank
        and ``part_count`` = the rank count; no rank gathers the grid.
        """
        return self.submit(build_slice(time=time, iteration=iteration, variable_set=self.variable_set,
                                       patches=patches, check_finite=check_finite, part_index=part_index,
                                       part_count=part_count), crop_to_windows=crop_to_windows)

    def flush(self, timeout_s: float | None = 30.0) -> bool:
        """Wait until every submitted slice is acknowledged, refused or dropped; False on timeout."""
        deadline = None if timeout_s is None else time.monotonic() + timeout_s
        with self._cond:
            while self._queue or self._in_flight is not None:
                remaining = None if deadline is None else deadline - time.monotonic()
                if remaining is not None and remaining <= 0:
                    return False
                self._cond.wait(remaining)
        return True

    @property
    def pending(self) -> int:
        """Slices waiting or being sent."""
        with self._cond:
            return len(self._queue) + (self._in_flight is not None)

    def _send_loop(self) -> None:
        if self._state == "pending" and not self._establish():
            with self._cond:
                never_sent, self._queue = list(self._queue), deque()
                self._cond.notify_all()
            for pending in never_sent:  # stopped before the run opened (a refusal failed them already)
                self._drop(pending, "handle_closed")
            return
        while True:
            with self._cond:
                while not self._queue and not self._stopping.is_set():
                    self._cond.wait()
                if not self._queue:
                    return
                pending = self._queue.popleft()
                self._in_flight = pending
            try:
                self._send(pending)
            finally:
                with self._cond:
                    self._in_flight = None
                    self._cond.notify_all()

    def _windows_for(self, slice_: OutgoingSlice) -> DataWindows | None:
        """The windows to crop ``slice_`` to: the cached ones, or (no follower) asked for now;
        None when the server has issued none (expired ones are grown by :meth:`_cropped`)."""
        if self._follower is not None:
            with self._latest_lock:
                windows = self._latest_windows
        else:
            try:
                windows = self._client.latest_windows(self.run_id)
            except PenumbraError:
                windows = None
        return windows if windows is not None and windows.windows else None

    def _cropped(self, pending: _Pending) -> tuple[OutgoingSlice, bool]:
        """The slice cut to the windows, grown when the slice is later than their validity
        (cropping.grow_expired_windows); whole without windows or when the cut saves too little."""
        slice_ = pending.slice_
        if not pending.crop:
            return slice_, False
        windows = self._windows_for(slice_)
        if windows is None:
            self.stats.sent_whole += 1
            self.stats.whole_without_windows += 1
            return slice_, False
        try:
            growth = windows.grown_bounds(slice_.time)
            cut = (crop_outgoing_slice(slice_, growth.bounds, extra_nodes=windows.extra_nodes)
                   if growth is not None else None)
        except ValueError:  # malformed windows must not stop the sender: send the slice whole
            growth, cut = None, None
        if cut is None:  # a part the windows miss is not None: it goes as an empty part
            self.stats.sent_whole += 1
            return slice_, False
        if growth.grown and not worth_cropping(cut.nbytes, slice_.nbytes):
            self.stats.sent_whole += 1
            self.stats.whole_nearly_all += 1
            return slice_, False
        self.stats.grown += int(growth.grown)
        return cut, True

    def _held_by_server(self, iteration: int) -> bool:
        """Whether the server already holds ``iteration``, its newest slice (asked after a failed
        upload: a crash after the slice reached the server's spool loses only the answer).
        Equality only: a lower iteration the server might not hold is resent (and answered as a
        duplicate if held)."""
        try:
            run = self._client._stub.GetRun(pb.GetRunRequest(run_id=self.run_id), timeout=self._client.deadline_s)
        except (grpc.RpcError, ValueError):
            return False
        return run.run.highest_held_iteration == iteration and run.run.slices_received > 0

    def _send(self, pending: _Pending) -> None:
        stub = self._client._stub
        full_bytes = pending.slice_.nbytes
        slice_, cropped = self._cropped(pending)
        if self.ask_admission and slice_.part_count <= 1 and not self._admitted(slice_):
            with self._cond:
                self.stats.server_busy += 1
            self._drop(pending, "server_busy")
            return
        deadline_s = self._client.deadline_s + slice_.nbytes / _SEND_BYTES_PER_S
        started = time.monotonic()
        backoff = 0.1
        attempts = 0
        while True:
            attempts += 1
            t0 = time.perf_counter()
            try:
                response = stub.SendSlice(slice_.requests(self.run_id, chunk_bytes=self.chunk_bytes),
                                          timeout=deadline_s, wait_for_ready=True)
            except ValueError:  # the client was closed under the sender
                self._drop(pending, "handle_closed", attempts=attempts)
                return
            except grpc.RpcError as exc:
                if exc.code() not in RETRYABLE_SEND:
                    error = error_from_rpc(exc, "SendSlice")
                    self.stats.refused += 1
                    self.errors.append(error)
                    pending.ticket._fail(error)
                    self._link_works()  # a refusal is an answer: the link is up
                    return
                self._ledger.mark_down(f"SendSlice: {exc.code().name}: {exc.details()}",
                                       since=time.time() - (time.perf_counter() - t0))
                with self._cond:
                    newer_waiting = len(self._queue) >= self.queue_depth
                if newer_waiting or self._stopping.is_set() or time.monotonic() - started > self.max_retry_s:
                    # Keep newest: a full queue of newer slices beats retrying this one.
                    reason = ("handle_closed" if self._stopping.is_set() else "link_down" if newer_waiting
                              else "retry_time_exceeded")
                    self._drop(pending, reason, attempts=attempts)
                    return
                self.stats.retries += 1
                self._stopping.wait(backoff)
                backoff = min(2 * backoff, 2.0)
                # A part too: the server counts an iteration sent in parts as held once every
                # part is on its disk (a crash after the last part was kept loses only the answer).
                if self._held_by_server(slice_.iteration):
                    self.stats.held_by_server += 1
                    self.stats.duplicates += 1
                    pending.ticket._resolve(SliceAck(iteration=slice_.iteration, accepted=False, duplicate=True,
                                                     attempts=attempts, persisted=True))
                    self._link_works()
                    return
                continue
            ack = SliceAck.from_wire(response, attempts=attempts, cropped=cropped, uncropped_bytes=full_bytes,
                                     part_index=slice_.part_index)
            self.stats.send_seconds += time.perf_counter() - t0
            self.stats.sent += 1
            self.stats.bytes_sent += slice_.nbytes
            self.stats.bytes_uncropped += full_bytes
            self.stats.cropped += int(cropped)
            self.stats.duplicates += int(ack.duplicate)
            pending.ticket._resolve(ack)
            self._link_works()
            return

    def _admitted(self, slice_: OutgoingSlice) -> bool:
        """Ask the server whether it would take ``slice_`` (AdmissionReserve; a few hundred bytes
        each way). Any failure to ask means upload as usual; a server without the call is not
        asked again."""
        request = pb.AdmissionReserveRequest(run_id=self.run_id, iteration=slice_.iteration, total_bytes=slice_.nbytes)
        try:
            reply = self._client._stub.AdmissionReserve(request, timeout=self._client.deadline_s)
        except ValueError:  # the client was closed under the sender: the upload reports it
            return True
        except grpc.RpcError as exc:
            if exc.code() == grpc.StatusCode.UNIMPLEMENTED:
                self.ask_admission = False
            return True
        return bool(reply.admitted)
