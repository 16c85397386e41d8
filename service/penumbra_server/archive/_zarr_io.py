"""zarr work of the archive writer: column blocks from rows, bulk writes, group creation,
metadata consolidation (synchronous wrappers over zarr's I/O loop)."""

from __future__ import annotations

import asyncio
import os
import threading
import warnings
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
import zarr
from zarr.core.buffer import default_buffer_prototype
from zarr.core.sync import sync as zarr_sync
from zarr.storage import MemoryStore

from .. import crash_points
from . import _layout as layout

__all__ = ["ArchiveError", "members", "column_block", "write_blocks", "consolidate", "create_column", "create_columns",
           "create_groups"]

_WARNINGS_LOCK = threading.Lock()
#: zarr's note on the journal directory inside the group (journal.py): expected, not a fault.
_NOT_ZARR = "Object at journal is not recognized as a component of a Zarr hierarchy"


def members(group: zarr.Group) -> list:
    """Every member of ``group`` (all depths), without zarr's note on the journal directory."""
    with _WARNINGS_LOCK, warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=_NOT_ZARR)
        return list(group.members(max_depth=None))


class ArchiveError(RuntimeError):
    """The archive on disk is missing, belongs to another format, or a row is malformed."""


def column_block(column: layout.Column, rows: Sequence[Mapping], row_kind: str) -> np.ndarray:
    """Stack one column of ``rows`` into an array of shape (len(rows), *trailing)."""
    if column.dtype == "str":
        return np.array(["" if row.get(column.name) is None else str(row[column.name]) for row in rows], dtype=object)
    trailing = tuple(size for _, size in column.trailing)
    block = np.full((len(rows),) + trailing, column.fill_value, dtype=column.dtype)
    for index, row in enumerate(rows):
        if column.name not in row or row[column.name] is None:
            continue
        value = np.asarray(row[column.name], dtype=column.dtype)
        if value.shape != trailing:
            raise ArchiveError(
                f"{row_kind} row {index}, column {column.name!r}: expected shape {trailing}, got {value.shape}"
            )
        block[index] = value
    return block


def write_blocks(blocks: Sequence[tuple[zarr.Array, int, int, np.ndarray]]) -> None:
    """Grow each array to ``stop`` rows and write ``block`` to rows start:stop, all columns at
    once: one wait for zarr's I/O loop per fold instead of two per column (a fold touches
    about 200 columns)."""
    async def write(arr: zarr.Array, start: int, stop: int, block: np.ndarray) -> None:
        target = arr.async_array
        if target.shape[0] != stop:
            await target.resize((stop,) + tuple(target.shape[1:]))
        await target.setitem(slice(start, stop), block)

    async def write_all() -> None:
        await asyncio.gather(*(write(*entry) for entry in blocks))

    if blocks:
        zarr_sync(write_all())


def consolidate(group: zarr.Group) -> None:
    """Write the consolidated metadata (after the committed counts): ``xarray.open_zarr`` then
    opens any group without a fallback warning and sees exactly the last commit's rows.
    The archive's own reader ignores it and trusts ``committed_rows``."""
    # catch_warnings swaps the process's filter list: one thread at a time (runs write on
    # threads of their own).
    with _WARNINGS_LOCK, warnings.catch_warnings():
        # zarr notes that consolidated metadata is not yet part of the v3 specification; the
        # archive stays readable without it (every zarr.json is still written).
        warnings.filterwarnings("ignore", message="Consolidated metadata is currently not part")
        warnings.filterwarnings("ignore", message=_NOT_ZARR)
        zarr.consolidate_metadata(group.store)


def _column_arguments(column: layout.Column, row_dimension: str, rows: int = 0) -> dict:
    attrs = {}
    if column.unit:
        attrs["units"] = column.unit
    if column.description:
        attrs["description"] = column.description
    return dict(
        name=column.name,
        shape=(rows,) + tuple(size for _, size in column.trailing),
        chunks=column.chunks(),
        dtype=str if column.dtype == "str" else column.dtype,
        fill_value=column.fill_value,
        dimension_names=column.dimension_names(row_dimension),
        attributes=attrs or None,  # one metadata write per array
    )


def create_column(group: zarr.Group, column: layout.Column, row_dimension: str) -> zarr.Array:
    return group.create_array(**_column_arguments(column, row_dimension))


def create_columns(group: zarr.Group, columns: Sequence[layout.Column], row_dimension: str, rows: int = 0) -> None:
    """Create the group's arrays with ``rows`` rows of fill values; see :func:`create_groups`."""
    create_groups([(group, columns, row_dimension, rows)])


def create_groups(groups: Sequence[tuple[zarr.Group, Sequence[layout.Column], str, int]]) -> None:
    """Create the arrays of each (group, columns, row dimension, rows): ``rows`` rows of fill
    values each (a fold makes them as long as the rows it is about to write: no resize after);
    arrays a killed earlier attempt made are reused (emptied to that length). The first half of
    every group's columns, then the crash point once per group (each group half created), then
    the second halves.

    A new array's ``zarr.json`` is made by zarr in memory and written to the group's directory
    in one atomic file write: zarr's own creation on disk checks for existing nodes and rewrites
    the parents' metadata, a dozen file operations per array, most of a fold's time when a run's
    first fold creates its ~200 tracking and common-surface arrays."""
    existing = [dict(group.arrays()) for group, *_ in groups]
    template = zarr.open_group(MemoryStore(), mode="w", zarr_format=3)

    def half_of(columns: Sequence[layout.Column], half: int) -> Sequence[layout.Column]:
        middle = len(columns) // 2
        return columns[:middle] if half == 0 else columns[middle:]

    async def make(half: int) -> None:
        jobs, made = [], []
        for index, ((group, columns, row_dimension, rows), arrays) in enumerate(zip(groups, existing)):
            for column in half_of(columns, half):
                arr = arrays.get(column.name)
                if arr is None:
                    name = f"g{index}/{column.name}"
                    jobs.append(template._async_group.create_array(**dict(_column_arguments(column, row_dimension, rows),
                                                                          name=name)))
                    made.append((name, group, column.name))
                elif arr.shape[0]:
                    # Emptied first: the rows a killed fold left must not show through as data.
                    jobs.append(_empty_to(arr.async_array, rows))
                elif rows:
                    jobs.append(arr.async_array.resize((rows,) + arr.shape[1:]))
        await asyncio.gather(*jobs)
        prototype = default_buffer_prototype()
        for name, group, column_name in made:
            metadata = await template.store.get(f"{name}/zarr.json", prototype=prototype)
            _write_atomically(Path(group.store.root) / group.path / column_name / "zarr.json", metadata.to_bytes())

    zarr_sync(make(0))
    for _ in groups:
        crash_points.reached("archive-mid-group")
    zarr_sync(make(1))


def _write_atomically(path: Path, data: bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.with_name(f".{path.name}.tmp")
    temporary.write_bytes(data)
    os.replace(temporary, path)


async def _empty_to(arr, rows: int) -> None:
    await arr.resize((0,) + tuple(arr.shape[1:]))
    if rows:
        await arr.resize((rows,) + tuple(arr.shape[1:]))
