"""`penumbra serve`: run the server in the foreground until SIGINT or SIGTERM."""

from __future__ import annotations

import asyncio
import os
import signal
import sys
from pathlib import Path

__all__ = ["serve", "serve_config", "write_ready_file"]


def write_ready_file(path: Path, address: str) -> None:
    """Write ``address`` to ``path`` atomically, so a reader never sees half a line."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + f".tmp{os.getpid()}")
    tmp.write_text(address + "\n")
    os.replace(tmp, path)


async def _serve(config) -> int:
    from penumbra_server.server.config import (ConfigError, engine_settings, server_credentials, server_options,
                                               token_book)
    from penumbra_server.server.auth import ExposureError, check_exposure
    from penumbra_server.server.executors import start_executor

    settings = config["server"]
    listen, archive_root = settings["listen"], Path(settings["archive_root"])
    ready_file, grace_s = settings["ready_file"], settings["grace_s"]
    try:
        # The server's default planner (server/planning.py) seeds each body at its forecast and, for a
        # pair, looks for the common horizon once the bodies are close.
        options = server_options(config)
        credentials = server_credentials(config)
        tokens = token_book(config)
        engine = engine_settings(config)
    except ConfigError as err:
        print(f"penumbra: {err}", file=sys.stderr)
        return 2
    try:
        # Refuse an unsafe address before starting any worker (create_server checks it again).
        check_exposure(listen.rpartition(":")[0].strip("[]") or "127.0.0.1", tls=credentials is not None,
                       tokens=bool(tokens), trusted_network=settings["trusted_network"])
    except ExposureError as err:
        print(f"penumbra: refusing to serve on {listen}: {err}", file=sys.stderr)
        return 2
    archive_root.mkdir(parents=True, exist_ok=True)
    # The workers start before the gRPC server (grpc and fork do not mix).
    try:
        executor = await start_executor(engine)
    except (OSError, RuntimeError, ValueError) as err:
        print(f"penumbra: cannot start the {engine.engine} engine ({engine.describe()}): {err}", file=sys.stderr)
        return 1
    try:
        return await _serve_with(config, executor, engine.describe(), listen, archive_root, options, credentials,
                                 tokens, ready_file, grace_s)
    finally:
        await executor.close()


async def _serve_with(config, executor, engine_text, listen, archive_root, options, credentials, tokens, ready_file,
                      grace_s) -> int:
    from penumbra_server.server import create_server
    from penumbra_server.server.auth import ExposureError

    try:
        server = await create_server(listen, archive_root=archive_root, executor=executor, options=options,
                                     server_credentials=credentials, token_book=tokens,
                                     trusted_network=config["server"]["trusted_network"])
    except ExposureError as err:
        print(f"penumbra: refusing to serve on {listen}: {err}", file=sys.stderr)
        return 2
    except (OSError, RuntimeError) as err:
        # grpc.aio reports a failed bind as RuntimeError("Failed to bind to address ...").
        print(f"penumbra: cannot serve on {listen}: {err}", file=sys.stderr)
        return 1
    await server.start()
    security = ", ".join(filter(None, [
        "TLS" + (" with client certificates" if config["tls"]["client_ca"] else "") if credentials else "no TLS",
        f"{len(tokens)} tokens" if tokens else "no tokens (open)",
    ]))
    print(f"penumbra: serving on {server.address} (archive {archive_root.resolve()}, finder: {engine_text}; {security})",
          flush=True)
    if ready_file is not None:
        write_ready_file(ready_file, server.address)
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, stop.set)
    terminated = asyncio.ensure_future(server.wait_for_termination())
    stopping = asyncio.ensure_future(stop.wait())
    await asyncio.wait({terminated, stopping}, return_when=asyncio.FIRST_COMPLETED)
    if stopping.done():
        print(f"penumbra: stopping (grace {grace_s:g} s)", flush=True)
        await server.stop(grace_s=grace_s)
    for task in (terminated, stopping):
        task.cancel()
    if ready_file is not None:
        Path(ready_file).unlink(missing_ok=True)
    print("penumbra: stopped", flush=True)
    return 0


def serve_config(config) -> int:
    """Run the server of an effective configuration (server/config.py); return the exit status."""
    return asyncio.run(_serve(config))


def serve(*, listen: str, archive_root: Path, workers: int, ready_file: Path | None = None, grace_s: float = 5.0,
          common_horizon: bool = True) -> int:
    """Run the server with these settings and the defaults for the rest; return the exit status.

    ``common_horizon``: look for a common surface in two-body runs
    (:class:`penumbra_server.server.SteeringPlanner`, the server's default planner).
    """
    from penumbra_server.server.config import default_config, merge

    overrides = {"server": {"listen": listen, "archive_root": str(archive_root), "workers": workers,
                            "ready_file": "" if ready_file is None else str(ready_file), "grace_s": grace_s},
                 "options": {"common_horizon": common_horizon}}
    return serve_config(merge(default_config(), overrides, base=Path.cwd(), source="serve()"))
