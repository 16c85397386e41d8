"""A run's spool: the acknowledged slices not yet archived, kept on disk so that a crash loses none.

Layout: ``<archive_root>/<run_id>.spool/`` holds one file per slice, ``it<iteration>.slice``: an
8-byte little-endian header length, a JSON header (time, iteration, variable set, bytes received,
arrival wall clock, and per patch origin, spacing, shape, level, memory order and each field's
byte offset), then every field's float64 values, raw, in the patch's memory order.

A slice is written to ``.it<iteration>.slice.tmp``, flushed to the disk (fsync), renamed to its final
name and the directory flushed, all before the client is answered; a kill at any moment leaves
either no file (the client was not answered and resends) or a complete one. The file is removed
once the archive commit holding the slice's row is written (processed, skipped or failed: its
fate is final). A restarted server replays what remains, in iteration order; a temporary file is
a write the kill interrupted, never acknowledged, and is removed. The parts of a slice sent in
parts live in the same directory until the slice is assembled (part_files.py).

Synchronous: call from a worker thread (the run's archive thread or ``asyncio.to_thread``).
"""

from __future__ import annotations

import json
import os
import re
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable

import numpy as np

from ..durable import fsync_directory
from ..numerics.slices import Patch, Slice, VariableSet
from .run_types import QueuedSlice

__all__ = ["SPOOL_SUFFIX", "RunSpool", "SpoolEntry", "read_record", "spool_path", "write_record"]

#: Directory suffix of a run's spool beside its archive.
SPOOL_SUFFIX = ".spool"
_NAME = re.compile(r"^it(-?\d+)\.slice$")
_LENGTH = 8


def spool_path(archive_root, run_id: str) -> Path:
    """``<archive_root>/<run_id>.spool``."""
    return Path(archive_root) / f"{run_id}{SPOOL_SUFFIX}"


@dataclass(frozen=True)
class SpoolEntry:
    """One spooled slice on disk: its iteration and file."""

    iteration: int
    path: Path


def _field_bytes(arr: np.ndarray, order: str) -> memoryview:
    """The values of ``arr`` (float64) in ``order`` as bytes, without a copy when already laid out so."""
    flat = np.asarray(arr, dtype="<f8").ravel(order=order)
    return memoryview(np.ascontiguousarray(flat)).cast("B")


def write_record(directory: Path, name: str, header: dict, patches) -> Path:
    """Write ``header`` (JSON-able) and the fields of ``patches`` as ``directory/name`` durably:
    to ``.<name>.tmp``, flushed to the disk, renamed, the directory flushed. Returns the path."""
    from .. import crash_points

    directory.mkdir(parents=True, exist_ok=True)
    header = dict(header, patches=[])
    blocks: list[memoryview] = []
    offset = 0
    for patch in patches:
        order = patch.memory_order if patch.memory_order in ("C", "F") else "C"
        entry = {"origin": [float(v) for v in patch.origin], "spacing": [float(v) for v in patch.spacing],
                 "shape": [int(n) for n in patch.shape], "level": int(patch.level), "memory_order": order,
                 "fields": {}}
        for field_name, values in patch.fields.items():
            block = _field_bytes(values, order)
            entry["fields"][field_name] = offset
            offset += block.nbytes
            blocks.append(block)
        header["patches"].append(entry)
    encoded = json.dumps(header).encode()
    final = directory / name
    temporary = directory / f".{name}.tmp"
    with open(temporary, "wb") as f:
        f.write(len(encoded).to_bytes(_LENGTH, "little"))
        f.write(encoded)
        for block in blocks:
            f.write(block)
        f.flush()
        os.fsync(f.fileno())
    crash_points.reached("spool-before-rename")
    os.replace(temporary, final)
    fsync_directory(directory)
    return final


def read_record(path: Path) -> tuple[dict, tuple[Patch, ...]]:
    """The header and patches of a file :func:`write_record` wrote (ValueError naming the file
    if it is malformed). The field arrays are views of one buffer read from the file."""
    data = bytearray(path.stat().st_size)  # writable: the arrays are views of it
    with open(path, "rb") as f:
        f.readinto(data)
    try:
        length = int.from_bytes(data[:_LENGTH], "little")
        header = json.loads(data[_LENGTH:_LENGTH + length])
        base = _LENGTH + length
        patches = []
        for spec in header["patches"]:
            shape = tuple(spec["shape"])
            count = int(np.prod(shape))
            fields = {}
            for field_name, offset in spec["fields"].items():
                values = np.frombuffer(data, dtype="<f8", count=count, offset=base + offset)
                fields[field_name] = values.reshape(shape, order=spec["memory_order"])
            patches.append(Patch(origin=np.array(spec["origin"]), spacing=np.array(spec["spacing"]), shape=shape,
                                 level=spec["level"], fields=fields, memory_order=spec["memory_order"]))
    except (ValueError, KeyError, TypeError) as exc:
        raise ValueError(f"{path}: not a readable spool file: {exc}") from None
    return header, tuple(patches)


class RunSpool:
    """The spool directory of one run (module docstring)."""

    def __init__(self, directory: Path) -> None:
        self.directory = Path(directory)
        #: Iterations with a spool file written by this process or found at startup.
        self.held: set[int] = set()

    def path_for(self, iteration: int) -> Path:
        return self.directory / f"it{int(iteration)}.slice"

    def write(self, item: QueuedSlice) -> Path:
        """Write ``item`` durably (flushed, renamed, directory flushed). Returns its path."""
        slice_ = item.slice_
        header = {"time": slice_.time, "iteration": int(slice_.iteration), "variable_set": slice_.variable_set.value,
                  "nbytes": int(item.nbytes), "arrival_unix_s": float(item.arrival_unix_s)}
        final = write_record(self.directory, self.path_for(slice_.iteration).name, header, slice_.patches)
        self.held.add(int(slice_.iteration))
        return final

    def entries(self) -> list[SpoolEntry]:
        """The spooled slices in iteration order; interrupted writes (temporary files) are removed."""
        if not self.directory.is_dir():
            return []
        found = []
        for path in self.directory.iterdir():
            match = _NAME.match(path.name)
            if match:
                found.append(SpoolEntry(int(match.group(1)), path))
            elif path.name.endswith(".tmp"):
                path.unlink(missing_ok=True)
        found.sort(key=lambda e: e.iteration)
        self.held.update(e.iteration for e in found)
        return found

    @staticmethod
    def load(entry: SpoolEntry, *, excised_spheres: tuple = ()) -> QueuedSlice:
        """The queued slice of a spool file (ValueError naming the file if it is malformed)."""
        header, patches = read_record(entry.path)
        try:
            slice_ = Slice(time=float(header["time"]), iteration=int(header["iteration"]),
                           variable_set=VariableSet.parse(header["variable_set"]), patches=patches,
                           excised_spheres=tuple(excised_spheres))
            return QueuedSlice(slice_=slice_, nbytes=int(header["nbytes"]),
                               arrival_unix_s=float(header["arrival_unix_s"]))
        except (ValueError, KeyError, TypeError) as exc:
            raise ValueError(f"{entry.path}: not a readable spool file: {exc}") from None

    def release(self, iterations: Iterable[int]) -> None:
        """Remove the files of ``iterations`` (their rows are archived); absent ones are ignored."""
        removed = False
        for iteration in iterations:
            path = self.path_for(iteration)
            if path.exists():
                path.unlink(missing_ok=True)
                removed = True
            self.held.discard(int(iteration))
        if removed:
            fsync_directory(self.directory)

    def remove_all(self) -> None:
        """Remove the spool directory (a closed run: everything it acknowledged is archived)."""
        shutil.rmtree(self.directory, ignore_errors=True)
        self.held.clear()

    @property
    def count(self) -> int:
        return len(self.held)
