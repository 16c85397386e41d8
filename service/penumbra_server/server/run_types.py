"""Small records of the run layer: server-wide run options and a slice waiting in a run's queue."""

from __future__ import annotations

from dataclasses import dataclass

from ..archive.writer import FoldPolicy
from ..numerics.slices import Slice

__all__ = ["ManagerOptions", "QueuedSlice"]


@dataclass(frozen=True)
class ManagerOptions:
    """Server-wide run options."""

    default_queue_depth: int = 4
    event_log_limit: int = 100_000
    subscriber_queue_size: int = 1024
    interpolation_order: int = 4
    common_horizon: bool = True
    #: Slices of one run whose finds may run at once (the next slice's finds start from the
    #: forecast while earlier ones are still searched); results are applied in iteration order.
    slices_in_flight: int = 1
    #: When a run's archive journal is folded into its zarr arrays (archive/writer.py).
    archive_fold: FoldPolicy = FoldPolicy()


@dataclass(frozen=True, eq=False)
class QueuedSlice:
    """An assembled slice waiting to be processed."""

    slice_: Slice
    nbytes: int
    arrival_unix_s: float

    @property
    def iteration(self) -> int:
        return self.slice_.iteration
