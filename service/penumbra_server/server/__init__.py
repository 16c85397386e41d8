"""The Penumbra gRPC server: runs, ingest, scheduling, workers, event fan-out.

Entry points: :func:`create_server` (asyncio) and :class:`BackgroundServer` (own thread).
"""

from .app import SERVICE_NAME, BackgroundServer, PenumbraServer, ServerOptions, create_server
from .executors import FinderExecutor, ProcessPoolFinderExecutor
from .scheduler import ExpectedBodiesPlanner, SurfacePlan, SurfacePlanner, SurfaceTrack

__all__ = [
    "SERVICE_NAME",
    "BackgroundServer",
    "ExpectedBodiesPlanner",
    "FinderExecutor",
    "PenumbraServer",
    "ProcessPoolFinderExecutor",
    "ServerOptions",
    "SurfacePlan",
    "SurfacePlanner",
    "SurfaceTrack",
    "create_server",
]
