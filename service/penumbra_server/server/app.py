"""Building and running the server: :func:`create_server` (asyncio) and
:class:`BackgroundServer` (a server on its own thread and event loop, for synchronous code).

Order matters: the worker processes start before the gRPC server exists (grpc and fork do not
mix; the workers use spawn anyway), then the server binds, then runs left open in the archive
root are re-opened, then the server starts answering (a client retrying a slice of a re-opened
run meanwhile sees UNAVAILABLE and retries, never NOT_FOUND).
"""

from __future__ import annotations

import asyncio
import logging
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Sequence

import grpc
from grpc_health.v1 import health, health_pb2, health_pb2_grpc
from grpc_reflection.v1alpha import reflection

from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_shim._wire import horizons_pb2_grpc as pb_grpc

from ..archive.writer import FoldPolicy
from ._spec import RunSettings
from .allocator import return_large_buffers
from .auth import AuthInterceptor, check_exposure
from .executors import FinderExecutor, ProcessPoolFinderExecutor
from .jobs import SERVICE_INTERPOLATION_ORDER
from .ingest import IngestLimits
from .run_manager import RunManager
from .runs import ManagerOptions
from .scheduler import SurfacePlanner
from .service import HorizonServicer
from .tokens import TokenBook, WriterTokens

__all__ = ["SERVICE_NAME", "ServerOptions", "PenumbraServer", "create_server", "BackgroundServer"]

log = logging.getLogger("penumbra.server")

#: Full name of the service, as health checking and reflection report it.
SERVICE_NAME = pb.DESCRIPTOR.services_by_name["HorizonService"].full_name
# gRPC's own message limit sits above our chunk limit, so an oversized chunk gets our clear
# message (RESOURCE_EXHAUSTED naming chunk.data) instead of the transport's.
_TRANSPORT_MESSAGE_LIMIT = 64 * 1024 * 1024


@dataclass(frozen=True)
class ServerOptions:
    """Keyword options of :func:`create_server` (defaults shown)."""

    workers: int = 2
    default_queue_depth: int = 4
    max_chunk_bytes: int = 4 * 1024 * 1024
    max_slice_bytes: int = 2 * 1024**3
    #: Patches one slice header may declare (more: RESOURCE_EXHAUSTED, reason TOO_MANY_PATCHES).
    max_patches_per_header: int = 4096
    #: Field names one patch may declare (more: RESOURCE_EXHAUSTED, reason TOO_MANY_FIELDS).
    max_fields_per_patch: int = 64
    #: Seconds a SendSlice stream may stay silent before it is aborted (DEADLINE_EXCEEDED,
    #: reason UPLOAD_IDLE); 0: no limit.
    upload_idle_timeout_s: float = 300.0
    #: Server-wide budget of slice bytes queued in all runs plus those arriving (more:
    #: RESOURCE_EXHAUSTED, reason QUEUED_BYTES_BUDGET); 0: no budget.
    max_queued_bytes: int = 4 * 1024**3
    #: Open runs one client may hold (keyed by its token's name when tokens are configured, else
    #: by the peer's host; more: RESOURCE_EXHAUSTED, reason TOO_MANY_OPEN_RUNS); 0: no limit.
    max_open_runs_per_client: int = 1024
    #: Archive bytes the runs one client opened may hold (same client key as
    #: max_open_runs_per_client; checked at OpenRun and at each slice's header by summing the
    #: run directories' file sizes; at or over: RESOURCE_EXHAUSTED, reason
    #: ARCHIVE_BYTES_PER_CLIENT); 0: no limit.
    max_archive_bytes_per_client: int = 0
    event_log_limit: int = 100_000
    subscriber_queue_size: int = 1024
    interpolation_order: int = SERVICE_INTERPOLATION_ORDER
    restore_runs: bool = True
    #: Look for the common horizon of two-body runs (the default planner; `serve --no-common-horizon`).
    common_horizon: bool = True
    #: Slices of one run searched at once: the finds of slice n+1 start from the forecast while
    #: slice n is still searched (server/pipeline.py); results are applied, archived and
    #: announced in iteration order. 1 (default): one slice at a time, each seeded from the
    #: one before, so a run's results do not depend on how fast the workers are; 2 or more
    #: keeps every worker busy when one run's slices come faster than one slice's finds.
    slices_in_flight: int = 1
    #: The archive's write-behind (archive/writer.py): a commit is one durable journal file; the
    #: zarr arrays receive the journal's rows in bulk ("fold") once it holds this many commits,
    #: once its oldest commit is archive_fold_after_s old (also when the run is idle), when the
    #: run closes, when the server stops and when a restarted server reopens the run. The
    #: project's reader sees every committed row at once; xarray.open_zarr sees the folded rows.
    archive_fold_commits: int = 64
    archive_fold_after_s: float = 30.0
    #: Per run, the planner of the surfaces to look for; None: the default
    #: :class:`~penumbra_server.server.planning.SteeringPlanner` (forecast seeds, common horizon).
    #: A planner with an ``attach(steering)`` method is handed the run's tracking state.
    planner_factory: Callable[[RunSettings], SurfacePlanner] | None = field(default=None, compare=False)
    #: Per run, callbacks ``(run, queued_slice, outcomes)`` after each processed slice (a hook for
    #: custom tracking); they may call ``run.publish(...)`` to emit events.
    slice_observer_factory: Callable[[RunSettings], Sequence[Callable]] | None = field(default=None, compare=False)


class PenumbraServer:
    """A bound, not yet started server. ``port`` and ``address`` are known at once."""

    def __init__(self, *, grpc_server: grpc.aio.Server, port: int, host: str, manager: RunManager,
                 executor: FinderExecutor, health_servicer: health.aio.HealthServicer, owns_executor: bool,
                 restore_runs: bool) -> None:
        self.grpc_server = grpc_server
        self.port = port
        self.host = host
        self.manager = manager
        self.executor = executor
        self._health = health_servicer
        self._owns_executor = owns_executor
        self._restore_runs = restore_runs
        self._stopped = False
        self.restored_run_ids: list[str] = []

    @property
    def address(self) -> str:
        return f"{self.host}:{self.port}"

    async def start(self) -> None:
        if self._restore_runs:
            self.restored_run_ids = await self.manager.restore()
        await self.grpc_server.start()
        await self._health.set(SERVICE_NAME, health_pb2.HealthCheckResponse.SERVING)
        await self._health.set("", health_pb2.HealthCheckResponse.SERVING)
        log.info("penumbra server listening on %s (%d workers)", self.address, self.executor.workers)

    async def wait_for_termination(self) -> None:
        await self.grpc_server.wait_for_termination()

    async def stop(self, grace_s: float | None = 2.0) -> None:
        """Health to NOT_SERVING, stop the gRPC server (grace), stop runs and workers. Idempotent."""
        if self._stopped:
            return
        self._stopped = True
        await self._health.enter_graceful_shutdown()
        self.manager.stop_watchers()  # watch streams never end by themselves: tell them to reconnect
        await self.grpc_server.stop(grace_s)
        await self.manager.shutdown()
        if self._owns_executor:
            await self.executor.close()


def _split_address(address: str) -> str:
    host, sep, port = address.rpartition(":")
    if not sep or not port.isdigit():
        raise ValueError(f"address: expected host:port (e.g. 127.0.0.1:50051 or 127.0.0.1:0), got {address!r}")
    return host.strip("[]") or "127.0.0.1"


async def create_server(
    address: str = "127.0.0.1:0",
    *,
    archive_root: str | Path,
    workers: int = 2,
    executor: FinderExecutor | None = None,
    options: ServerOptions | None = None,
    server_credentials: grpc.ServerCredentials | None = None,
    token_book: TokenBook | None = None,
    trusted_network: bool = False,
) -> PenumbraServer:
    """Start the worker pool, then build and bind the gRPC server (call ``await server.start()``).

    Args:
        address: host:port to listen on; 127.0.0.1 by default, port 0 picks a free port.
        archive_root: directory holding one zarr group per run (created if missing).
        workers: worker processes of the default executor (ignored when ``executor`` is given).
        executor: a :class:`FinderExecutor` to use instead of a local process pool (not closed
            by :meth:`PenumbraServer.stop`).
        options: further :class:`ServerOptions` (``options.workers`` is overridden by ``workers``).
        server_credentials: TLS credentials; None listens without TLS.
        token_book: the configured bearer tokens and their roles (server/auth.py); None or
            empty: every call is allowed (loopback or a trusted network only).
        trusted_network: allow listening beyond loopback without TLS and tokens.

    Raises:
        OSError: the address could not be bound (gRPC reports that as port 0).
        ExposureError: a non-loopback address without TLS and tokens, not declared trusted.
    """
    return_large_buffers()  # freed slice buffers leave the process (allocator.py)
    host = _split_address(address)
    token_book = token_book or TokenBook()
    check_exposure(host, tls=server_credentials is not None, tokens=bool(token_book), trusted_network=trusted_network)
    options = options or ServerOptions()
    if options.slices_in_flight < 1:
        raise ValueError(f"slices_in_flight: expected at least 1 slice of a run in flight, got {options.slices_in_flight}")
    if options.archive_fold_commits < 1:
        raise ValueError(f"archive_fold_commits: expected at least 1 commit per fold, got {options.archive_fold_commits}")
    if not options.archive_fold_after_s > 0:
        raise ValueError(f"archive_fold_after_s: expected a positive number of seconds, got {options.archive_fold_after_s}")
    archive_root = Path(archive_root)
    archive_root.mkdir(parents=True, exist_ok=True)
    owns_executor = executor is None
    if executor is None:
        executor = await ProcessPoolFinderExecutor.start(workers)
    try:
        manager = RunManager(
            archive_root=archive_root,
            executor=executor,
            options=ManagerOptions(
                default_queue_depth=options.default_queue_depth,
                event_log_limit=options.event_log_limit,
                subscriber_queue_size=options.subscriber_queue_size,
                interpolation_order=options.interpolation_order,
                common_horizon=options.common_horizon,
                slices_in_flight=options.slices_in_flight,
                archive_fold=FoldPolicy(commits=options.archive_fold_commits,
                                        after_s=options.archive_fold_after_s),
            ),
            planner_factory=options.planner_factory,
            slice_observer_factory=options.slice_observer_factory,
        )
        grpc_server = grpc.aio.server(
            interceptors=[AuthInterceptor(token_book, WriterTokens(archive_root))],
            options=[
                # A second server on the same port would silently share it without this.
                ("grpc.so_reuseport", 0),
                ("grpc.max_receive_message_length", _TRANSPORT_MESSAGE_LIMIT),
                ("grpc.max_send_message_length", _TRANSPORT_MESSAGE_LIMIT),
                # Tolerate the shim's keepalive pings (every 20 s) without GOAWAY.
                ("grpc.http2.min_ping_interval_without_data_ms", 10_000),
                ("grpc.keepalive_permit_without_calls", 1),
            ]
        )
        servicer = HorizonServicer(
            manager, limits=IngestLimits(max_chunk_bytes=options.max_chunk_bytes, max_slice_bytes=options.max_slice_bytes,
                                     max_patches_per_header=options.max_patches_per_header,
                                     max_fields_per_patch=options.max_fields_per_patch),
            upload_idle_timeout_s=options.upload_idle_timeout_s or None,
            max_queued_bytes=options.max_queued_bytes or None,
            max_open_runs_per_client=options.max_open_runs_per_client or None, token_book=token_book,
            max_archive_bytes_per_client=options.max_archive_bytes_per_client or None,
        )
        pb_grpc.add_HorizonServiceServicer_to_server(servicer, grpc_server)
        health_servicer = health.aio.HealthServicer()
        health_pb2_grpc.add_HealthServicer_to_server(health_servicer, grpc_server)
        await health_servicer.set(SERVICE_NAME, health_pb2.HealthCheckResponse.NOT_SERVING)
        reflection.enable_server_reflection(
            (SERVICE_NAME, health_pb2.DESCRIPTOR.services_by_name["Health"].full_name, reflection.SERVICE_NAME),
            grpc_server,
        )
        try:
            if server_credentials is None:
                port = grpc_server.add_insecure_port(address)
            else:
                port = grpc_server.add_secure_port(address, server_credentials)
        except RuntimeError:  # newer grpcio raises on a failed bind
            port = 0
        if port == 0:  # older grpcio reports a failed bind as port 0 instead of raising
            raise OSError(f"address: could not listen on {address} (in use, or not an address of this machine)")
    except BaseException:
        if owns_executor:
            await executor.close()
        raise
    server = PenumbraServer(grpc_server=grpc_server, port=port, host=host, manager=manager, executor=executor,
                            health_servicer=health_servicer, owns_executor=owns_executor,
                            restore_runs=options.restore_runs)
    return server


class BackgroundServer:
    """A Penumbra server on its own thread and event loop, for synchronous callers.

    ``with BackgroundServer(archive_root=path) as bg: bg.address`` — the server is listening when
    the constructor's :meth:`start` returns and stopped on exit.
    """

    def __init__(self, address: str = "127.0.0.1:0", *, archive_root: str | Path, workers: int = 2,
                 options: ServerOptions | None = None, start_timeout_s: float = 60.0,
                 server_credentials: grpc.ServerCredentials | None = None, token_book: TokenBook | None = None,
                 trusted_network: bool = False, executor: FinderExecutor | None = None) -> None:
        self._address = address
        # ``executor``: as create_server's (not closed on stop; e.g. a test's executor that holds jobs).
        self._server_kwargs = dict(server_credentials=server_credentials, token_book=token_book,
                              trusted_network=trusted_network, executor=executor)
        self._archive_root = archive_root
        self._workers = workers
        self._options = options
        self._start_timeout_s = start_timeout_s
        self._thread: threading.Thread | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._ready = threading.Event()
        self._stop_requested: asyncio.Event | None = None
        self._error: BaseException | None = None
        self.server: PenumbraServer | None = None

    @property
    def address(self) -> str:
        return self.server.address

    @property
    def port(self) -> int:
        return self.server.port

    def start(self) -> "BackgroundServer":
        if self._thread is not None:
            return self
        self._thread = threading.Thread(target=self._main, name="penumbra-server", daemon=True)
        self._thread.start()
        if not self._ready.wait(self._start_timeout_s):
            raise TimeoutError(f"server did not start within {self._start_timeout_s} s")
        if self._error is not None:
            raise self._error
        return self

    def _main(self) -> None:
        try:
            asyncio.run(self._serve())
        except BaseException as exc:  # reported to start() or logged
            if not self._ready.is_set():
                self._error = exc
                self._ready.set()
            else:
                log.exception("background server stopped with an error")

    async def _serve(self) -> None:
        self._loop = asyncio.get_running_loop()
        self._stop_requested = asyncio.Event()
        try:
            self.server = await create_server(self._address, archive_root=self._archive_root, workers=self._workers,
                                              options=self._options, **self._server_kwargs)
            await self.server.start()
        except BaseException as exc:
            self._error = exc
            self._ready.set()
            return
        self._ready.set()
        await self._stop_requested.wait()
        await self.server.stop(self._grace_s)

    _grace_s: float | None = 1.0

    def call(self, coroutine_factory: Callable[[], object], timeout_s: float = 30.0):
        """Run ``coroutine_factory()`` on the server's loop and return its result (tests, tools)."""
        future = asyncio.run_coroutine_threadsafe(coroutine_factory(), self._loop)
        return future.result(timeout_s)

    def stop(self, grace_s: float | None = 1.0, timeout_s: float = 60.0) -> None:
        """Stop the server and wait for its thread (idempotent)."""
        if self._thread is None:
            return
        self._grace_s = grace_s
        if self._loop is not None and self._stop_requested is not None and not self._loop.is_closed():
            self._loop.call_soon_threadsafe(self._stop_requested.set)
        self._thread.join(timeout_s)
        self._thread = None

    def __enter__(self) -> "BackgroundServer":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()
