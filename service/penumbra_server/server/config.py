"""The server's configuration file (TOML) and the effective configuration of `penumbra serve`.

Precedence: built-in defaults, then the file (``penumbra serve --config FILE``), then
command-line options. Relative paths in the file are relative to the file's directory; on the
command line, to the working directory. ``penumbra serve --print-config`` prints the result::

    [server]
    listen = "10.1.2.3:50717"          # HOST:PORT
    archive_root = "/shared/penumbra"
    workers = 7                        # worker processes of the process engine
    engine = "process"                 # or "dask": finder jobs on a Dask cluster ([dask])
    ready_file = "/shared/penumbra/server-address"
    grace_s = 5.0
    trusted_network = false            # true: allow a non-loopback bind without TLS and tokens

    [tls]                              # all three are paths to PEM files
    certificate = "server.crt"
    private_key = "server.key"
    client_ca = "clients-ca.crt"       # optional: clients must present a certificate it signed

    [auth]
    token_files = ["tokens.toml"]      # [[token]] tables: name, role, sha256 (server/tokens.py)

    [dask]                             # with engine = "dask": exactly one of the first two
    scheduler = "tcp://node17:8786"    # a running Dask scheduler (deploy/penumbra-dask.sbatch)
    local_workers = 0                  # or: a LocalCluster of this many worker processes here
    task_retries = 1                   # reruns of a task that raised
    resubmissions = 2                  # submissions again after the job's worker was lost

    [options]                          # every scalar field of ServerOptions (server/app.py)
    max_slice_bytes = 2147483648
"""

from __future__ import annotations

import dataclasses
import os
import tomllib
from pathlib import Path
from typing import Any, Mapping

from .app import ServerOptions
from .errors import PenumbraServerError

__all__ = ["SECTIONS", "ConfigError", "default_config", "load_config_file", "merge", "format_toml",
           "option_fields", "server_options", "server_credentials", "token_book", "default_workers",
           "engine_settings", "DEFAULT_LISTEN"]

DEFAULT_LISTEN = "127.0.0.1:50717"


class ConfigError(PenumbraServerError, ValueError):
    """A configuration value is missing, unknown or of the wrong kind; the message names it."""


def default_workers() -> int:
    """Cores minus one (one for the gRPC event loop), at least 1."""
    return max(1, (os.cpu_count() or 2) - 1)


def option_fields() -> dict[str, type]:
    """ServerOptions' scalar fields (name: type) except ``workers`` (which lives in [server])."""
    found = {}
    for f in dataclasses.fields(ServerOptions):
        if f.name != "workers" and type(f.default) in (bool, int, float, str):
            found[f.name] = type(f.default)
    return found


# Kinds: str, "str?" (may be unset), int, float, bool, "path", "path?" (may be unset), "paths" (a list).
SECTIONS: dict[str, dict[str, Any]] = {
    "server": {"listen": str, "archive_root": "path", "workers": int, "engine": str, "ready_file": "path?",
               "grace_s": float, "trusted_network": bool},
    "dask": {"scheduler": "str?", "local_workers": int, "task_retries": int, "resubmissions": int},
    "tls": {"certificate": "path?", "private_key": "path?", "client_ca": "path?"},
    "auth": {"token_files": "paths"},
}


def _sections() -> dict[str, dict[str, Any]]:
    return {**SECTIONS, "options": option_fields()}


def default_config() -> dict[str, dict[str, Any]]:
    """The built-in defaults (unset optional paths are None)."""
    options = ServerOptions()
    return {
        "server": {"listen": DEFAULT_LISTEN, "archive_root": Path("penumbra-archive").resolve(),
                   "workers": default_workers(), "engine": "process", "ready_file": None, "grace_s": 5.0,
                   "trusted_network": False},
        "dask": {"scheduler": None, "local_workers": 0, "task_retries": 1, "resubmissions": 2},
        "tls": {"certificate": None, "private_key": None, "client_ca": None},
        "auth": {"token_files": []},
        "options": {name: getattr(options, name) for name in option_fields()},
    }


def _coerce(where: str, kind, value, base: Path):
    def path(v):
        if not isinstance(v, (str, os.PathLike)) or not str(v):
            raise ConfigError(f"{where}: expected a path, got {v!r}")
        p = Path(v).expanduser()
        return p if p.is_absolute() else (base / p).resolve()

    if kind == "path":
        return path(value)
    if kind == "path?":
        return None if value in (None, "") else path(value)
    if kind == "str?":
        if value in (None, ""):
            return None
        kind = str
    if kind == "paths":
        if not isinstance(value, (list, tuple)):
            raise ConfigError(f"{where}: expected a list of paths, got {value!r}")
        return [path(v) for v in value]
    if kind is bool:
        if not isinstance(value, bool):
            raise ConfigError(f"{where}: expected true or false, got {value!r}")
        return value
    if kind is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{where}: expected an integer, got {value!r}")
        return value
    if kind is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{where}: expected a number, got {value!r}")
        return float(value)
    if not isinstance(value, str):
        raise ConfigError(f"{where}: expected a string, got {value!r}")
    return value


def merge(config: Mapping[str, Mapping[str, Any]], overrides: Mapping[str, Mapping[str, Any]], *,
          base: Path, source: str) -> dict[str, dict[str, Any]]:
    """``config`` with ``overrides`` ({section: {key: value}}) checked and applied; relative
    paths are taken from ``base``; ``source`` names where the values came from in errors."""
    sections = _sections()
    merged = {name: dict(values) for name, values in config.items()}
    for section, values in overrides.items():
        if section not in sections:
            raise ConfigError(f"{source}: unknown section [{section}]; expected one of {', '.join(sections)}")
        if not isinstance(values, Mapping):
            raise ConfigError(f"{source}: [{section}] must be a table")
        for key, value in values.items():
            if key not in sections[section]:
                raise ConfigError(f"{source}: unknown key {section}.{key}; expected one of "
                                  f"{', '.join(sections[section])}")
            merged[section][key] = _coerce(f"{source}: {section}.{key}", sections[section][key], value, base)
    return merged


def load_config_file(path: str | Path, config: Mapping[str, Mapping[str, Any]] | None = None):
    """``config`` (default: the built-in defaults) with the TOML file at ``path`` applied."""
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text())
    except FileNotFoundError:
        raise ConfigError(f"config: no file {path}") from None
    except tomllib.TOMLDecodeError as err:
        raise ConfigError(f"config {path}: not valid TOML ({err})") from None
    return merge(config or default_config(), data, base=path.resolve().parent, source=f"config {path}")


def server_options(config: Mapping[str, Mapping[str, Any]], **fixed) -> ServerOptions:
    """The :class:`ServerOptions` of a configuration (``fixed``: fields given in code)."""
    return ServerOptions(workers=config["server"]["workers"], **config["options"], **fixed)


def engine_settings(config: Mapping[str, Mapping[str, Any]]):
    """The :class:`~penumbra_server.server.executors.EngineSettings` of [server] and [dask], checked."""
    from .executors import ENGINES, EngineSettings

    engine = config["server"]["engine"]
    dask = config["dask"]
    if engine not in ENGINES:
        raise ConfigError(f"server.engine: expected one of {', '.join(ENGINES)}, got {engine!r}")
    for key in ("local_workers", "task_retries", "resubmissions"):
        if dask[key] < 0:
            raise ConfigError(f"dask.{key}: expected 0 or more, got {dask[key]}")
    scheduler, local = dask["scheduler"], dask["local_workers"]
    if engine == "process":
        if scheduler is not None or local:
            given = "dask.scheduler" if scheduler is not None else "dask.local_workers"
            raise ConfigError(f"{given}: set, but server.engine is \"process\"; choose engine \"dask\" "
                              "(--engine dask) to use a Dask cluster")
    elif (scheduler is None) == (local == 0):
        raise ConfigError("dask.scheduler, dask.local_workers: engine \"dask\" needs exactly one of them "
                          "(--dask-scheduler tcp://HOST:8786 for a running scheduler, or --dask-local-workers N)")
    elif scheduler is not None:
        _check_scheduler_address(scheduler)
    return EngineSettings(engine=engine, workers=config["server"]["workers"], dask_scheduler=scheduler,
                          dask_local_workers=local, task_retries=dask["task_retries"],
                          resubmissions=dask["resubmissions"])


_SCHEDULER_PROTOCOLS = ("tcp", "tls", "ucx", "ws", "wss")


def _check_scheduler_address(address: str) -> None:
    protocol, sep, rest = address.partition("://")
    if not sep:
        protocol, rest = "tcp", address
    host, colon, port = rest.rpartition(":")
    if protocol not in _SCHEDULER_PROTOCOLS or not colon or not host or not port.isdigit():
        raise ConfigError(f"dask.scheduler: expected PROTOCOL://HOST:PORT with PROTOCOL one of "
                          f"{', '.join(_SCHEDULER_PROTOCOLS)} (e.g. tcp://node17:8786), got {address!r}")


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    text = str(value)
    escaped = "".join(c if c.isprintable() and c not in '"\\' else f"\\u{ord(c):04x}" for c in text)
    return f'"{escaped}"'


def format_toml(config: Mapping[str, Mapping[str, Any]]) -> str:
    """The configuration as a TOML file that :func:`load_config_file` reads back to the same values
    (unset optional paths are written as comments)."""
    lines = ["# penumbra serve: effective configuration"]
    for section, values in config.items():
        lines += ["", f"[{section}]"]
        for key, value in values.items():
            if value is None:
                lines.append(f"# {key} = (not set)")
            else:
                lines.append(f"{key} = {_toml_value(value)}")
    return "\n".join(lines) + "\n"


def server_credentials(config: Mapping[str, Mapping[str, Any]]):
    """``grpc.ssl_server_credentials`` from [tls], or None when no certificate is configured.
    With ``client_ca`` set, clients must present a certificate that CA signed (mutual TLS)."""
    import grpc

    tls = config["tls"]
    if tls["certificate"] is None and tls["private_key"] is None:
        if tls["client_ca"] is not None:
            raise ConfigError("tls.client_ca: needs tls.certificate and tls.private_key too")
        return None
    if tls["certificate"] is None or tls["private_key"] is None:
        missing = "tls.private_key" if tls["certificate"] is not None else "tls.certificate"
        raise ConfigError(f"{missing}: required with the other of tls.certificate / tls.private_key")

    def read(key: str) -> bytes:
        try:
            return Path(tls[key]).read_bytes()
        except OSError as err:
            raise ConfigError(f"tls.{key}: cannot read {tls[key]}: {err.strerror}") from None

    client_ca = None if tls["client_ca"] is None else read("client_ca")
    return grpc.ssl_server_credentials([(read("private_key"), read("certificate"))], root_certificates=client_ca,
                                       require_client_auth=client_ca is not None)


def token_book(config: Mapping[str, Mapping[str, Any]]):
    """The :class:`~penumbra_server.server.tokens.TokenBook` of [auth] (empty: no tokens)."""
    from .tokens import TokenBook

    try:
        return TokenBook.from_files(config["auth"]["token_files"])
    except OSError as err:
        raise ConfigError(f"auth.token_files: cannot read {err.filename}: {err.strerror}") from None
    except ValueError as err:
        raise ConfigError(f"auth.token_files: {err}") from None
