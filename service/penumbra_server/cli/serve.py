"""`penumbra serve`: run the server in the foreground until SIGINT or SIGTERM."""

from __future__ import annotations

import asyncio
import os
import signal
import sys
from pathlib import Path

__all__ = ["serve", "write_ready_file"]


def write_ready_file(path: Path, address: str) -> None:
    """Write ``address`` to ``path`` atomically, so a reader never sees half a line."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + f".tmp{os.getpid()}")
    tmp.write_text(address + "\n")
    os.replace(tmp, path)


async def _serve(*, listen: str, archive_root: Path, workers: int, ready_file: Path | None, grace_s: float,
                 common_horizon: bool) -> int:
    from penumbra_server.server import ServerOptions, create_server

    # The server's default planner (server/planning.py) seeds each body at its forecast and, for a
    # pair, looks for the common horizon once the bodies are close.
    options = ServerOptions(common_horizon=common_horizon)

    # The worker pool starts inside create_server, before the gRPC server (grpc and fork do not mix).
    try:
        server = await create_server(listen, archive_root=Path(archive_root), workers=workers, options=options)
    except (OSError, RuntimeError) as err:
        # grpc.aio reports a failed bind as RuntimeError("Failed to bind to address ...").
        print(f"penumbra: cannot serve on {listen}: {err}", file=sys.stderr)
        return 1
    await server.start()
    print(f"penumbra: serving on {server.address} (archive {Path(archive_root).resolve()}, workers: {workers})",
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


def serve(*, listen: str, archive_root: Path, workers: int, ready_file: Path | None = None, grace_s: float = 5.0,
          common_horizon: bool = True) -> int:
    """Run the server; return the process exit status.

    ``common_horizon``: look for a common surface in two-body runs
    (:class:`penumbra_server.server.SteeringPlanner`, the server's default planner).
    """
    Path(archive_root).mkdir(parents=True, exist_ok=True)
    return asyncio.run(_serve(listen=listen, archive_root=Path(archive_root), workers=workers,
                              ready_file=ready_file, grace_s=grace_s, common_horizon=common_horizon))
