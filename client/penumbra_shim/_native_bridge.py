"""The Python half of the C interface (client/native): plain arguments in, plain tuples out.

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
from ._fields import VARIABLE_SETS
from ._slices import PatchData
from ._spec_types import BacklogOptions, Body, FinderOptions, RefinementOptions, RunSpec

__all__ = ["BridgeError", "STATUS", "connect", "parse_spec", "Connection", "Run"]

#: pnl_status values of penumbra_link.h (keep the two in step).
STATUS = {
    "OK": 0, "INVALID_ARGUMENT": 1, "UNAVAILABLE": 2, "TIMEOUT": 3, "NOT_FOUND": 4, "FAILED_PRECONDITION": 5,
    "RESOURCE_EXHAUSTED": 6, "REFUSED": 7, "UNIMPLEMENTED": 8, "PYTHON_ERROR": 9, "INTERNAL": 10,
}
_GRPC_STATUS = {
    grpc.StatusCode.INVALID_ARGUMENT: "INVALID_ARGUMENT",
    grpc.StatusCode.UNAVAILABLE: "UNAVAILABLE",
    grpc.StatusCode.DEADLINE_EXCEEDED: "TIMEOUT",
    grpc.StatusCode.NOT_FOUND: "NOT_FOUND",
    grpc.StatusCode.FAILED_PRECONDITION: "FAILED_PRECONDITION",
    grpc.StatusCode.RESOURCE_EXHAUSTED: "RESOURCE_EXHAUSTED",
    grpc.StatusCode.UNIMPLEMENTED: "UNIMPLEMENTED",
}
# Multi-rank submits need the shim's parts support (part_index / part_count keywords).
_PARTS_SUPPORTED = "part_index" in inspect.signature(RunHandle.submit_arrays).parameters
# How often waiting calls look at the handle's cache (the GIL is free while they sleep).
_POLL_S = 0.05


class BridgeError(Exception):
    """A failure with its pnl_status value (``status``) and a message naming what is at fault."""

    def __init__(self, status: str, message: str) -> None:
        super().__init__(message)
        self.status = STATUS[status]
        self.status_name = status


def _translate(exc: BaseException) -> BridgeError:
    if isinstance(exc, BridgeError):
        return exc
    if isinstance(exc, PenumbraError) and exc.code is not None:  # the server refused
        return BridgeError(_GRPC_STATUS.get(exc.code, "REFUSED"), str(exc))
    if isinstance(exc, (SliceValidationError, ValueError, TypeError)):  # found before sending
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


# -- the run spec string ----------------------------------------------------------------------

_INT_KEYS = ("lmax", "lmax_common", "max_iterations", "queue_depth", "nesting_depth")
_FLOAT_KEYS = ("tolerance", "points_across_horizon", "steering_interval", "mass_scale_solar_masses",
               "part_deadline_s")
_FLAG_KEYS = ("crop_to_windows",)
_CHOICE_KEYS = {"symmetry": ("none", "bitant"), "shift_gauge": ("moving_puncture", "other")}
_SPEC_KEYS = ("variable_set", "body", "name") + _INT_KEYS + _FLOAT_KEYS + _FLAG_KEYS + tuple(_CHOICE_KEYS)


def _number(text: str, key: str, kind):
    try:
        value = kind(text.strip())
    except ValueError:
        expected = "an integer" if kind is int else "a number"
        raise BridgeError("INVALID_ARGUMENT", f"spec.{key}: expected {expected}, got {text.strip()!r}") from None
    if kind is float and not math.isfinite(value):
        raise BridgeError("INVALID_ARGUMENT", f"spec.{key}: expected a finite number, got {text.strip()!r}")
    return value


def _body(text: str, index: int) -> Body:
    parts = [p.strip() for p in text.split(",")]
    where = f"spec.body[{index}]"
    if len(parts) != 5:
        raise BridgeError("INVALID_ARGUMENT", f"{where}: expected LABEL,x,y,z,mass, got {text.strip()!r}")
    x, y, z, mass = (_number(p, f"body[{index}]", float) for p in parts[1:])
    try:
        return Body(parts[0], (x, y, z), mass)
    except ValueError as exc:
        raise BridgeError("INVALID_ARGUMENT", f"{where}.{exc}") from None


def parse_spec(text: str) -> tuple[RunSpec, dict]:
    """A :class:`RunSpec` and the handle options from a "key=value; ..." spec (see penumbra_link.h)."""
    values: dict = {}
    bodies: list[Body] = []
    for item in text.replace("\n", ";").split(";"):
        if not item.strip():
            continue
        key, sep, value = item.partition("=")
        key = key.strip()
        if not sep:
            raise BridgeError("INVALID_ARGUMENT", f"spec: expected key=value, got {item.strip()!r}")
        if key not in _SPEC_KEYS:
            raise BridgeError("INVALID_ARGUMENT", f"spec: unknown key {key!r}; expected one of {', '.join(_SPEC_KEYS)}")
        if key == "body":
            bodies.append(_body(value, len(bodies)))
        elif key in values:
            raise BridgeError("INVALID_ARGUMENT", f"spec.{key}: given twice")
        elif key in _INT_KEYS:
            values[key] = _number(value, key, int)
        elif key in _FLOAT_KEYS:
            values[key] = _number(value, key, float)
        elif key in _FLAG_KEYS:
            if value.strip() not in ("0", "1"):
                raise BridgeError("INVALID_ARGUMENT", f"spec.{key}: expected 0 or 1, got {value.strip()!r}")
            values[key] = value.strip() == "1"
        elif key in _CHOICE_KEYS:
            if value.strip() not in _CHOICE_KEYS[key]:
                raise BridgeError("INVALID_ARGUMENT",
                                  f"spec.{key}: expected one of {', '.join(_CHOICE_KEYS[key])}, got {value.strip()!r}")
            values[key] = value.strip()
        else:
            values[key] = value.strip()
    variable_set = values.get("variable_set")
    if variable_set not in VARIABLE_SETS:
        raise BridgeError("INVALID_ARGUMENT",
                          f"spec.variable_set: expected one of {', '.join(VARIABLE_SETS)}, got {variable_set!r}")
    if not bodies:
        raise BridgeError("INVALID_ARGUMENT", "spec.body: expected at least one body=LABEL,x,y,z,mass")
    finder_defaults, refine_defaults = FinderOptions(), RefinementOptions()
    try:
        spec = RunSpec(
            variable_set=variable_set, bodies=bodies, name=values.get("name", ""),
            mass_scale_solar_masses=values.get("mass_scale_solar_masses", 0.0),
            finder=FinderOptions(lmax=values.get("lmax", finder_defaults.lmax),
                                 tolerance=values.get("tolerance", finder_defaults.tolerance),
                                 max_iterations=values.get("max_iterations", finder_defaults.max_iterations),
                                 lmax_common=values.get("lmax_common", finder_defaults.lmax_common)),
            backlog=BacklogOptions(queue_depth=values.get("queue_depth", BacklogOptions().queue_depth)),
            refinement=RefinementOptions(
                points_across_horizon=values.get("points_across_horizon", refine_defaults.points_across_horizon),
                nesting_depth=values.get("nesting_depth", refine_defaults.nesting_depth),
                steering_interval=values.get("steering_interval", refine_defaults.steering_interval)),
            symmetry=values.get("symmetry", "none"),
            shift_gauge=values.get("shift_gauge"),
            part_deadline_s=values.get("part_deadline_s", 0.0),
        )
    except ValueError as exc:
        raise BridgeError("INVALID_ARGUMENT", f"spec: {exc}") from None
    return spec, {"crop_to_windows": values.get("crop_to_windows", False)}


# -- connection and run -------------------------------------------------------------------------


@_guarded
def connect(target: str, timeout_s: float) -> "Connection":
    """A :class:`Connection` to ``target`` once the server answers, within ``timeout_s`` seconds."""
    timeout_s = _timeout(timeout_s)
    client = Client(target, deadline_s=timeout_s, retry_budget_s=timeout_s)
    try:
        # The shim's channel connects lazily: wait here, so an unreachable server is reported now.
        grpc.channel_ready_future(client._channel).result(timeout=timeout_s)
    except grpc.FutureTimeoutError:
        client.close()
        raise BridgeError("UNAVAILABLE", f"target: no Penumbra server answered at {target} within {timeout_s:g} s") \
            from None
    except BaseException:
        client.close()
        raise
    return Connection(client)


class Connection:
    """The C library's pnl_connection: one shim :class:`Client`."""

    def __init__(self, client: Client) -> None:
        self._client = client

    @_guarded
    def open_run(self, spec_text: str) -> "Run":
        spec, options = parse_spec(spec_text)
        return Run(self._client.open_run(spec, crop_to_windows=options["crop_to_windows"]), spec)

    @_guarded
    def attach_run(self, run_id: str) -> "Run":
        if not run_id.strip():
            raise BridgeError("INVALID_ARGUMENT", "run_id: expected a run id, got an empty string")
        handle = self._client.attach_run(run_id.strip())
        return Run(handle, handle.info.spec)

    @_guarded
    def close(self) -> None:
        self._client.close()


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

    def __init__(self, handle: RunHandle, spec: RunSpec) -> None:
        self._handle = handle
        self.run_id = handle.run_id
        self._labels = tuple(b.label for b in spec.bodies)
        self._reported_errors = 0
        self._lock = threading.Lock()

    @_guarded
    def submit(self, time: float, iteration: int, rank: int, nranks: int, patches: list) -> float:
        """Build (validate + copy) and queue the slice; returns the seconds the shim's queueing took."""
        parts = {}
        if nranks > 1:
            if not _PARTS_SUPPORTED:
                raise BridgeError("UNIMPLEMENTED", f"nranks: {nranks} ranks need a shim with parts support "
                                                   "(RunHandle.submit_arrays(part_index=, part_count=)); "
                                                   "this one accepts whole slices only (nranks = 1)")
            parts = {"part_index": rank, "part_count": nranks}
        built = [_patch(entry, i) for i, entry in enumerate(patches)]
        ticket = self._handle.submit_arrays(time=time, iteration=iteration, patches=built, **parts)
        return ticket.submit_block_s

    @_guarded
    def flush(self, timeout_s: float) -> None:
        if not self._handle.flush(_timeout(timeout_s)):
            raise BridgeError("TIMEOUT", f"timeout_s: {self._handle.pending} slice(s) still pending after "
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
            states = self._handle.latest_surfaces()
            behind = [label for label in self._labels
                      if label not in states or states[label].latest_attempt_iteration < iteration]
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
        radius_mean)."""
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
        bodies) with per body (label, centre (3,), finest_level, radii, spacings, finest_spacing)."""
        g = self._handle.latest_guidance(refresh=bool(refresh))
        if g is None:
            return None
        bodies = [(b.label, tuple(float(v) for v in b.centre), int(b.finest_level),
                   tuple(float(v) for v in b.radii), tuple(float(v) for v in b.spacings), float(b.finest_spacing))
                  for b in g.bodies]
        return (float(g.time), int(g.iteration), float(g.valid_from), float(g.valid_until), bool(g.post_merger)), bodies

    @_guarded
    def close(self, close_on_server: bool, timeout_s: float) -> None:
        self._handle.close(close_run=bool(close_on_server), timeout_s=_timeout(timeout_s))
