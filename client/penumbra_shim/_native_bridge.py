"""The Python half of the C interface (client/native): plain arguments in, plain tuples out.

Pending: nothing here waits longer than the timeout the C caller gave. A server that has not
answered by then gives a usable connection or run handle all the same, with a note (the C side
returns PNL_PENDING and the note as its message); the shim's handle keeps trying in the
background, queues slices by its keep-newest policy and counts every drop.

The C library calls these functions with ints, floats, strings and memoryviews over the
caller's arrays, and reads back tuples of the same. Every failure is raised as
:class:`BridgeError`, whose ``status`` is a ``pnl_status`` value of penumbra_link.h; the C
side turns it into a status code and a message (nothing reaches the caller as an exception).

Caller memory: each field arrives as a read-only memoryview over the caller's doubles, is
viewed with ``numpy.frombuffer`` (no copy) and reshaped in the declared order;
:func:`~penumbra_shim.build_slice` takes the defensive copy, so no view outlives the call.
"""

from __future__ import annotations

import functools
import inspect
import math
import threading
import time as _time

import grpc
import numpy as np

from ._client import Client
from ._run_handle import RunHandle
from ._errors import PenumbraError, SliceValidationError
from ._fields import VARIABLE_SETS, required_fields
from ._native_input import RUN_STATES, STATUS, BridgeError, parse_options, parse_spec
from ._slices import PatchData, build_slice
from ._spec_types import RunSpec

__all__ = ["BridgeError", "STATUS", "RUN_STATES", "connect", "parse_spec", "parse_options", "Connection", "Run"]

_GRPC_STATUS = {
    grpc.StatusCode.INVALID_ARGUMENT: "INVALID_ARGUMENT",
    grpc.StatusCode.UNAVAILABLE: "UNAVAILABLE",
    grpc.StatusCode.DEADLINE_EXCEEDED: "TIMEOUT",
    grpc.StatusCode.NOT_FOUND: "NOT_FOUND",
    grpc.StatusCode.FAILED_PRECONDITION: "FAILED_PRECONDITION",
    grpc.StatusCode.RESOURCE_EXHAUSTED: "RESOURCE_EXHAUSTED",
    grpc.StatusCode.UNIMPLEMENTED: "UNIMPLEMENTED",
    grpc.StatusCode.UNAUTHENTICATED: "UNAUTHENTICATED",
    grpc.StatusCode.PERMISSION_DENIED: "PERMISSION_DENIED",
}
# What a C or Fortran caller does about a missing or refused token (the server's message says
# which token the call needs; this says where such a token goes).
_TOKEN_HINT = {
    "UNAUTHENTICATED": "; give token=... or token_file=... in pnl_connect_with's options",
    "PERMISSION_DENIED": "; check the token given in pnl_connect_with's options, or the writer token given to "
                         "pnl_attach_run_with_token",
}
# Multi-rank submits need the shim's parts support (part_index / part_count keywords).
_PARTS_SUPPORTED = "part_index" in inspect.signature(RunHandle.submit_arrays).parameters
# How often waiting calls look at the handle's cache (the GIL is free while they sleep).
_POLL_S = 0.05


def _translate(exc: BaseException) -> BridgeError:
    if isinstance(exc, BridgeError):
        return exc
    if isinstance(exc, PenumbraError) and exc.code is not None:  # the server's refusal
        status = _GRPC_STATUS.get(exc.code, "REFUSED")
        return BridgeError(status, str(exc) + _TOKEN_HINT.get(status, ""))
    if isinstance(exc, (SliceValidationError, ValueError, TypeError)):
        return BridgeError("INVALID_ARGUMENT", str(exc))
    if isinstance(exc, RuntimeError) and "closed" in str(exc):
        return BridgeError("FAILED_PRECONDITION", str(exc))
    if isinstance(exc, (TimeoutError, grpc.FutureTimeoutError)):
        return BridgeError("TIMEOUT", str(exc) or "timed out")
    return BridgeError("INTERNAL", f"{type(exc).__name__}: {exc}")


def _guarded(fn):
    """Every exception leaves as a BridgeError (the C side reads its status)."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except Exception as exc:
            raise _translate(exc) from None

    return wrapper


def _timeout(value: float, name: str = "timeout_s") -> float:
    if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
        raise BridgeError("INVALID_ARGUMENT", f"{name}: expected a finite number of seconds > 0, got {value!r}")
    return float(value)


# -- connection and run -------------------------------------------------------------------------


@_guarded
def connect(target: str, timeout_s: float, options: str = "") -> tuple["Connection", str]:
    """A :class:`Connection` to ``target`` and "" once the server answers within ``timeout_s``
    seconds, else the connection (its channel keeps trying) and a note saying what is awaited.
    ``options``: pnl_connect_with's "key=value; ..." text (:func:`parse_options`)."""
    timeout_s = _timeout(timeout_s)
    keywords = parse_options(options or "")
    client = Client(target, deadline_s=timeout_s, retry_budget_s=timeout_s, **keywords)
    # The shim's channel connects lazily: wait here (at most timeout_s) to know whether it answers.
    ready = grpc.channel_ready_future(client._channel)
    try:
        ready.result(timeout=timeout_s)
    except grpc.FutureTimeoutError:
        ready.cancel()
        cause = ("with TLS, a certificate one side does not accept looks the same"
                 if keywords["credentials"] is not None else
                 "a server that demands TLS looks the same: give tls_ca=... in pnl_connect_with's options")
        return Connection(client, timeout_s), (
            f"no Penumbra server answered at {target} within {timeout_s:g} s ({cause}); the connection keeps "
            "trying, and runs opened on it are pending until the server answers")
    except BaseException:
        client.close()
        raise
    return Connection(client, timeout_s), ""


class Connection:
    """The C library's pnl_connection: one shim :class:`Client` and the caller's timeout."""

    def __init__(self, client: Client, timeout_s: float) -> None:
        self._client = client
        self._timeout_s = timeout_s

    @_guarded
    def open_run(self, spec_text: str) -> tuple["Run", str]:
        """The run handle and "" if the run opened within the timeout, else a note (pending)."""
        spec, options = parse_spec(spec_text)
        run = Run(self._client.open_run(spec, crop_to_windows=options["crop_to_windows"],
                                        open_timeout_s=self._timeout_s), spec, self._timeout_s)
        return run, run.pending_note()

    @_guarded
    def attach_run(self, run_id: str, writer_token: str = "") -> tuple["Run", str]:
        """As :meth:`open_run`, for a run that is already open; ``writer_token`` "" for none."""
        if not run_id.strip():
            raise BridgeError("INVALID_ARGUMENT", "run_id: expected a run id, got an empty string")
        token = writer_token.strip()
        if writer_token and (not token or any(c.isspace() for c in token)):
            raise BridgeError("INVALID_ARGUMENT", "writer_token: expected one word (the run's writer token), got "
                                                  f"{'white space' if not token else 'text with white space'}")
        handle = self._client.attach_run(run_id.strip(), open_timeout_s=self._timeout_s, writer_token=token or None)
        run = Run(handle, None, self._timeout_s)
        return run, run.pending_note()

    @_guarded
    def close(self) -> None:
        self._client.close()


def _variable_set_of(patches: list[PatchData]) -> str:
    """The one variable set whose required fields the first patch carries (a pending attached
    handle does not know its run's variable set yet; the server checks it once the run opens)."""
    names = set(patches[0].fields)
    matching = [v for v in VARIABLE_SETS if set(required_fields(v)) <= names]
    if len(matching) != 1:
        raise BridgeError("INVALID_ARGUMENT",
                          "patches[0].field_names: the run is not open yet, so its variable set is not known here, "
                          f"and these fields carry {' and '.join(matching) or 'none'} of the variable sets; expected "
                          f"the required fields of exactly one of {', '.join(VARIABLE_SETS)}")
    return matching[0]


def _patch(entry, index: int) -> PatchData:
    """A :class:`PatchData` viewing the caller's memory (no copy)."""
    names_text, views, shape, spacing, origin, level, order = entry
    where = f"patches[{index}]"
    names = [n.strip() for n in names_text.split(",")]
    if len(names) != len(views) or not all(names):
        raise BridgeError("INVALID_ARGUMENT",
                          f"{where}.field_names: expected {len(views)} comma-separated names (field_count), "
                          f"got {names_text!r}")
    if len(set(names)) != len(names):
        raise BridgeError("INVALID_ARGUMENT", f"{where}.field_names: a name appears twice in {names_text!r}")
    fields = {name: np.frombuffer(view, dtype=np.float64).reshape(shape, order=order)
              for name, view in zip(names, views)}
    return PatchData(origin=origin, spacing=spacing, fields=fields, level=level, memory_order=order, shape=shape)


class Run:
    """The C library's pnl_run: one shim :class:`RunHandle` plus the refusals already reported."""

    def __init__(self, handle: RunHandle, spec: RunSpec | None, timeout_s: float) -> None:
        self._handle = handle
        self._spec_labels = None if spec is None else tuple(b.label for b in spec.bodies)
        self._timeout_s = timeout_s
        self._reported_errors = 0
        self._lock = threading.Lock()

    def _labels(self) -> tuple[str, ...] | None:
        """The expected bodies' labels; None while an attached handle's run is unknown."""
        if self._spec_labels is None and self._handle.info is not None:
            self._spec_labels = tuple(b.label for b in self._handle.info.spec.bodies)
        return self._spec_labels

    def pending_note(self) -> str:
        """"" unless the handle is pending; then what it waits for and what it does meanwhile."""
        if self._handle.state != "pending":
            return ""
        opening = self._spec_labels is not None  # made by open_run (attach_run knows no spec yet)
        what = "the run is not open yet" if opening else f"run {self._handle.run_id} is not reached yet"
        return (f"{what}: {self._handle._client.target} did not answer within {self._timeout_s:g} s; "
                "the handle keeps trying in the background, pnl_submit queues slices meanwhile (the newest "
                f"queue_depth = {self._handle.queue_depth} kept, every drop counted) and pnl_link_stats tells when "
                "the run opens")

    def _check_not_failed(self) -> None:
        """The server's refusal to open (or attach to) the run, once it came after the handle was returned."""
        if self._handle.state == "failed":
            error = _translate(self._handle._open_error)
            with self._lock:
                self._reported_errors = len(self._handle.errors)
            raise BridgeError(error.status_name, f"the server refused the run after the handle was returned: {error}")

    @_guarded
    def run_id(self) -> str:
        """The run's id; "" while a run being opened is pending."""
        if self._handle.run_id is None:
            self._check_not_failed()
        return self._handle.run_id or ""

    @_guarded
    def writer_token(self) -> str:
        """The run's writer token as this client holds it; "" while a run being opened is pending;
        NOT_FOUND when the handle holds none (attached without one)."""
        if self._handle.run_id is None:
            self._check_not_failed()
            return ""
        token = self._handle.writer_token
        if not token:
            raise BridgeError("NOT_FOUND", f"this handle holds no writer token for {self._handle.run_id} (it was "
                                           "attached without one: pnl_attach_run_with_token takes it)")
        return token

    @_guarded
    def link_stats(self) -> tuple:
        """(state, link_up, submitted, sent, dropped, refused, queued, dropped_link_down,
        dropped_queue_full, dropped_retry_time_exceeded, dropped_handle_closed, outages,
        gaps_recorded): the fields of pnl_link_stats in order."""
        h = self._handle
        stats, counts = h.stats, h.dropped_by_reason
        return (RUN_STATES[h.state], int(h.link_up), stats.submitted, stats.sent, stats.dropped_locally,
                stats.refused, h.pending, counts["link_down"], counts["queue_full"], counts["retry_time_exceeded"],
                counts["handle_closed"], h.link_outages, len(h.gaps))

    @_guarded
    def submit(self, time: float, iteration: int, rank: int, nranks: int, patches: list) -> float:
        """Build (validate + copy) and queue the slice; returns the seconds the shim's queueing took.
        Works on a pending handle: the slice waits in the handle's queue (keep newest)."""
        self._check_not_failed()
        parts = {}
        if nranks > 1:
            if not _PARTS_SUPPORTED:
                raise BridgeError("UNIMPLEMENTED", f"nranks: {nranks} ranks need a shim with parts support "
                                                   "(RunHandle.submit_arrays(part_index=, part_count=)); "
                                                   "this one accepts whole slices only (nranks = 1)")
            parts = {"part_index": rank, "part_count": nranks}
        built = [_patch(entry, i) for i, entry in enumerate(patches)]
        variable_set = self._handle.variable_set or _variable_set_of(built)
        ticket = self._handle.submit(build_slice(time=time, iteration=iteration, variable_set=variable_set,
                                                 patches=built, **parts))
        return ticket.submit_block_s

    @_guarded
    def flush(self, timeout_s: float) -> None:
        self._check_not_failed()
        if not self._handle.flush(_timeout(timeout_s)):
            self._check_not_failed()
            waiting = (f"the run is not open yet (no answer from {self._handle._client.target}); "
                       if self._handle.state == "pending" else "")
            raise BridgeError("TIMEOUT", f"timeout_s: {waiting}{self._handle.pending} slice(s) still pending after "
                                         f"{timeout_s:g} s")
        with self._lock:
            new = self._handle.errors[self._reported_errors:]
            self._reported_errors = len(self._handle.errors)
        if new:
            status = _translate(new[-1]).status_name
            raise BridgeError("REFUSED" if status == "INVALID_ARGUMENT" else status,
                              f"{len(new)} slice(s) refused; last: {new[-1]}")

    @_guarded
    def wait_surfaces(self, iteration: int, timeout_s: float) -> None:
        give_up = _time.monotonic() + _timeout(timeout_s)
        while True:
            self._check_not_failed()
            labels = self._labels()
            states = self._handle.latest_surfaces()
            behind = (["every body (the run is not open yet)"] if labels is None or self._handle.state == "pending"
                      else [label for label in labels
                            if label not in states or states[label].latest_attempt_iteration < iteration])
            if not behind:
                return
            if _time.monotonic() + _POLL_S > give_up:
                raise BridgeError("TIMEOUT", f"timeout_s: no attempt on iteration >= {iteration} for "
                                             f"{', '.join(behind)} within {timeout_s:g} s")
            _time.sleep(_POLL_S)

    @_guarded
    def surfaces(self, refresh: bool) -> list[tuple]:
        """Per surface: (label, ever_found, latest_attempt_found, latest_attempt_iteration,
        consecutive_misses, found_iteration, found_time, centroid (3,), area, irreducible_mass,
        radius_mean). None yet on a pending handle (no call is made)."""
        self._check_not_failed()
        rows = []
        for label, s in sorted(self._handle.latest_surfaces(refresh=bool(refresh)).items()):
            f = s.latest_found
            nan = float("nan")
            rows.append((label, f is not None, bool(s.latest_attempt_found), int(s.latest_attempt_iteration),
                         int(s.consecutive_misses), -1 if f is None else int(f.iteration),
                         nan if f is None else float(f.time),
                         (nan,) * 3 if f is None else tuple(float(v) for v in f.centroid),
                         nan if f is None else float(f.area), nan if f is None else float(f.irreducible_mass),
                         nan if f is None else float(f.radius_mean)))
        return rows

    @_guarded
    def guidance(self, refresh: bool):
        """None before any guidance, else ((time, iteration, valid_from, valid_until, post_merger),
        bodies) with per body (label, centre (3,), finest_level, radii, spacings, finest_spacing).
        On a pending handle: NOT_FOUND (nothing yet) saying the run is not open (no call is made)."""
        self._check_not_failed()
        if self._handle.state == "pending":
            raise BridgeError("NOT_FOUND", "no guidance yet: the run is not open yet (the server has not answered)")
        g = self._handle.latest_guidance(refresh=bool(refresh))
        if g is None:
            return None
        bodies = [(b.label, tuple(float(v) for v in b.centre), int(b.finest_level),
                   tuple(float(v) for v in b.radii), tuple(float(v) for v in b.spacings), float(b.finest_spacing))
                  for b in g.bodies]
        return (float(g.time), int(g.iteration), float(g.valid_from), float(g.valid_until), bool(g.post_merger)), bodies

    @_guarded
    def close(self, close_on_server: bool, timeout_s: float) -> None:
        """Close the handle (and the run on the server if asked). A handle whose run never opened
        within ``timeout_s`` is closed all the same (its queued slices dropped and counted) and
        reported as UNAVAILABLE; one the server refused, with that refusal."""
        self._handle.close(close_run=bool(close_on_server), timeout_s=_timeout(timeout_s))
        self._check_not_failed()
        if self._handle.state == "pending":
            stats = self._handle.stats
            raise BridgeError("UNAVAILABLE", f"the run never opened: {self._handle._client.target} did not answer "
                                             f"within timeout_s ({timeout_s:g} s); the handle is closed, and "
                                             f"{stats.dropped_locally} of its {stats.submitted} submitted slice(s) "
                                             "were dropped without reaching the server")
