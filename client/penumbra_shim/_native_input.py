"""The C interface's inputs as text: the run spec of pnl_open_run and the connection options of
pnl_connect_with ("key=value" items separated by ';' or newlines), and :class:`BridgeError`,
the failure with a ``pnl_status`` value that every bridge call raises.

Secrets stay out of messages: a token is never echoed, only the option (or file) it came from.
"""

from __future__ import annotations

import math
from pathlib import Path

from ._auth import channel_credentials
from ._fields import VARIABLE_SETS
from ._spec_types import BacklogOptions, Body, FinderOptions, RefinementOptions, RunSpec

__all__ = ["BridgeError", "STATUS", "RUN_STATES", "OPTION_KEYS", "parse_spec", "parse_options"]

#: pnl_status values of penumbra_link.h (keep the two in step). PENDING is not a failure.
STATUS = {
    "OK": 0, "INVALID_ARGUMENT": 1, "UNAVAILABLE": 2, "TIMEOUT": 3, "NOT_FOUND": 4, "FAILED_PRECONDITION": 5,
    "RESOURCE_EXHAUSTED": 6, "REFUSED": 7, "UNIMPLEMENTED": 8, "PYTHON_ERROR": 9, "INTERNAL": 10, "PENDING": 11,
    "UNAUTHENTICATED": 12, "PERMISSION_DENIED": 13,
}
#: pnl_run_state values of penumbra_link.h, by the shim's RunHandle.state.
RUN_STATES = {"pending": 0, "open": 1, "failed": 2, "closed": 3}


class BridgeError(Exception):
    """A failure with its pnl_status value (``status``) and a message naming what is at fault."""

    def __init__(self, status: str, message: str) -> None:
        super().__init__(message)
        self.status = STATUS[status]
        self.status_name = status


def _items(text: str, what: str, keys: tuple[str, ...]):
    """(key, value) of every non-empty "key=value" item, keys checked against ``keys``."""
    for item in text.replace("\n", ";").split(";"):
        if not item.strip():
            continue
        key, sep, value = item.partition("=")
        key = key.strip()
        if not sep:
            raise BridgeError("INVALID_ARGUMENT", f"{what}: expected key=value, got {item.strip()!r}")
        if key not in keys:
            raise BridgeError("INVALID_ARGUMENT", f"{what}: unknown key {key!r}; expected one of {', '.join(keys)}")
        yield key, value


# -- the run spec string ----------------------------------------------------------------------

_INT_KEYS = ("lmax", "lmax_common", "lmax_cap", "max_iterations", "queue_depth", "nesting_depth")
_FLOAT_KEYS = ("tolerance", "points_across_horizon", "steering_interval", "mass_scale_solar_masses",
               "part_deadline_s")
_FLAG_KEYS = ("crop_to_windows", "formation_forecast", "inner_common")
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
    for key, value in _items(text, "spec", _SPEC_KEYS):
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
                                 lmax_common=values.get("lmax_common", finder_defaults.lmax_common),
                                 lmax_cap=values.get("lmax_cap", finder_defaults.lmax_cap)),
            backlog=BacklogOptions(queue_depth=values.get("queue_depth", BacklogOptions().queue_depth)),
            refinement=RefinementOptions(
                points_across_horizon=values.get("points_across_horizon", refine_defaults.points_across_horizon),
                nesting_depth=values.get("nesting_depth", refine_defaults.nesting_depth),
                steering_interval=values.get("steering_interval", refine_defaults.steering_interval)),
            symmetry=values.get("symmetry", "none"),
            shift_gauge=values.get("shift_gauge"),
            part_deadline_s=values.get("part_deadline_s", 0.0),
            formation_forecast=values.get("formation_forecast", True),
            inner_common=values.get("inner_common", True),
        )
    except ValueError as exc:
        raise BridgeError("INVALID_ARGUMENT", f"spec: {exc}") from None
    return spec, {"crop_to_windows": values.get("crop_to_windows", False)}


# -- the connection options ---------------------------------------------------------------------

#: Keys of pnl_connect_with's options.
OPTION_KEYS = ("token", "token_file", "tls", "tls_ca", "tls_cert", "tls_key")


def _read(path_text: str, key: str, *, pem: bool) -> bytes:
    path = Path(path_text).expanduser()
    try:
        data = path.read_bytes()
    except OSError as err:
        raise BridgeError("INVALID_ARGUMENT", f"options.{key}: cannot read {path}: {err.strerror}") from None
    if pem and b"-----BEGIN" not in data:
        raise BridgeError("INVALID_ARGUMENT", f"options.{key}: {path} is not PEM (no '-----BEGIN' line)")
    return data


def _token_from_file(path_text: str) -> str:
    lines = _read(path_text, "token_file", pem=False).decode("utf-8", errors="replace").splitlines()
    token = lines[0].strip() if lines else ""
    if not token:
        raise BridgeError("INVALID_ARGUMENT", f"options.token_file: {path_text} has no token on its first line")
    return token


def parse_options(text: str) -> dict:
    """Keywords for :class:`~penumbra_shim.Client` (``token``, ``credentials``) from
    pnl_connect_with's options (see penumbra_link.h): ``token`` or ``token_file`` (its first
    line), ``tls=0|1`` (TLS with the system's roots), ``tls_ca`` (PEM roots; implies TLS),
    ``tls_cert`` + ``tls_key`` (client certificate for mutual TLS; implies TLS)."""
    values: dict[str, str] = {}
    for key, value in _items(text, "options", OPTION_KEYS):
        if key in values:
            raise BridgeError("INVALID_ARGUMENT", f"options.{key}: given twice")
        if not value.strip():
            raise BridgeError("INVALID_ARGUMENT", f"options.{key}: expected a value, got nothing")
        values[key] = value.strip()
    if "token" in values and "token_file" in values:
        raise BridgeError("INVALID_ARGUMENT", "options.token, options.token_file: give one or the other, not both")
    token = _token_from_file(values["token_file"]) if "token_file" in values else values.get("token")
    if token is not None and any(c.isspace() for c in token):
        source = "token_file" if "token_file" in values else "token"
        raise BridgeError("INVALID_ARGUMENT", f"options.{source}: expected one word (no spaces), got a token "
                                              "with white space")
    if ("tls_cert" in values) != ("tls_key" in values):
        missing = "tls_key" if "tls_cert" in values else "tls_cert"
        raise BridgeError("INVALID_ARGUMENT", f"options.{missing}: expected with "
                                              f"{'tls_cert' if missing == 'tls_key' else 'tls_key'} (mutual TLS "
                                              "needs the client's certificate and its key)")
    tls = values.get("tls")
    if tls not in (None, "0", "1"):
        raise BridgeError("INVALID_ARGUMENT", f"options.tls: expected 0 or 1, got {tls!r}")
    wants_tls = tls == "1" or "tls_ca" in values or "tls_cert" in values
    if tls == "0" and wants_tls:
        raise BridgeError("INVALID_ARGUMENT", "options.tls: 0 contradicts tls_ca / tls_cert, which need TLS")
    credentials = None
    if wants_tls:
        credentials = channel_credentials(
            _read(values["tls_ca"], "tls_ca", pem=True) if "tls_ca" in values else None,
            certificate_chain=_read(values["tls_cert"], "tls_cert", pem=True) if "tls_cert" in values else None,
            private_key=_read(values["tls_key"], "tls_key", pem=True) if "tls_key" in values else None)
    return {"token": token, "credentials": credentials}
