"""The Penumbra gRPC server: runs, ingest, scheduling, workers, event fan-out.

Entry points: :func:`create_server` (asyncio) and :class:`BackgroundServer` (own thread).
"""

from .app import SERVICE_NAME, BackgroundServer, PenumbraServer, ServerOptions, create_server
from .executors import FinderExecutor, ProcessPoolFinderExecutor
from .planning import SteeringPlanner, steering_planner_factory
from .scheduler import ExpectedBodiesPlanner, SurfacePlan, SurfacePlanner, SurfaceTrack
from .surface_state import SurfaceState
from .steering import COMMON_LABEL, RunSteering, common_label_for

__all__ = [
    "COMMON_LABEL",
    "RunSteering",
    "SteeringPlanner",
    "common_label_for",
    "steering_planner_factory",
    "SERVICE_NAME",
    "BackgroundServer",
    "ExpectedBodiesPlanner",
    "FinderExecutor",
    "PenumbraServer",
    "ProcessPoolFinderExecutor",
    "ServerOptions",
    "SurfacePlan",
    "SurfacePlanner",
    "SurfaceState",
    "SurfaceTrack",
    "create_server",
]
