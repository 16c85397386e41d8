"""The parts of slices sent in parts, kept on disk from before each part is acknowledged until
its slice is assembled and spooled whole.

Layout: in the run's spool directory (spool.py), one file per part, ``it<iteration>.part<k>of<m>``
(part ``k`` of ``m``), in the spool's record format (:func:`~.spool.write_record`): a JSON header
(iteration, time, variable set, part index and count, bytes received, arrival wall clock) and the
patches the part brought that no earlier part of its iteration carried (a patch two parts share
is kept once, in the file of the part that brought it first). Written to a temporary name,
flushed, renamed and the directory flushed before the part's OUTCOME_PART_ACCEPTED answer.

The files of an iteration are removed once its assembled slice is in the spool (the archive
thread writes the slice, then removes the parts), or at once when the slice is given up (its
parts carried no patch). A restarted server reads the files back (:meth:`PartFiles.iterations`)
and rebuilds the pending assemblies (parts.py).

Synchronous: call from the run's archive thread.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

from ..durable import fsync_directory
from ..numerics.slices import Patch, VariableSet
from .spool import read_record, write_record

__all__ = ["PartFiles", "StoredPart"]

_NAME = re.compile(r"^it(-?\d+)\.part(\d+)of(\d+)$")


@dataclass(frozen=True, eq=False)
class StoredPart:
    """One part read back from its file: what the assembly keeps of it."""

    iteration: int
    time: float
    variable_set: VariableSet
    index: int
    count: int
    patches: tuple[Patch, ...]
    nbytes: int
    arrival_unix_s: float


class PartFiles:
    """The part files of one run (module docstring), in ``directory`` (the run's spool)."""

    def __init__(self, directory: Path) -> None:
        self.directory = Path(directory)

    def path_for(self, iteration: int, index: int, count: int) -> Path:
        return self.directory / f"it{int(iteration)}.part{int(index)}of{int(count)}"

    def write(self, part: StoredPart) -> Path:
        """Write ``part`` durably (flushed, renamed, directory flushed). Returns its path."""
        header = {"iteration": int(part.iteration), "time": float(part.time),
                  "variable_set": part.variable_set.value, "part_index": int(part.index),
                  "part_count": int(part.count), "nbytes": int(part.nbytes),
                  "arrival_unix_s": float(part.arrival_unix_s)}
        name = self.path_for(part.iteration, part.index, part.count).name
        return write_record(self.directory, name, header, part.patches)

    def paths(self) -> dict[int, list[Path]]:
        """iteration -> its part files, in part order (no reads of their contents)."""
        found: dict[int, list[tuple[int, Path]]] = {}
        if not self.directory.is_dir():
            return {}
        for path in self.directory.iterdir():
            match = _NAME.match(path.name)
            if match:
                found.setdefault(int(match.group(1)), []).append((int(match.group(2)), path))
        return {it: [p for _, p in sorted(entries)] for it, entries in sorted(found.items())}

    @staticmethod
    def load(path: Path) -> StoredPart:
        """The part of one file (ValueError naming the file if it is malformed)."""
        header, patches = read_record(path)
        try:
            return StoredPart(iteration=int(header["iteration"]), time=float(header["time"]),
                              variable_set=VariableSet.parse(header["variable_set"]),
                              index=int(header["part_index"]), count=int(header["part_count"]), patches=patches,
                              nbytes=int(header["nbytes"]), arrival_unix_s=float(header["arrival_unix_s"]))
        except (ValueError, KeyError, TypeError) as exc:
            raise ValueError(f"{path}: not a readable part file: {exc}") from None

    def iterations(self) -> dict[int, list[StoredPart]]:
        """iteration -> the parts on disk, in part order (a restarted server's read). Files whose
        name and header disagree, or of a part count other than the iteration's first, raise
        ValueError naming the file."""
        result: dict[int, list[StoredPart]] = {}
        for iteration, paths in self.paths().items():
            parts = [self.load(path) for path in paths]
            for path, part in zip(paths, parts):
                if path.name != self.path_for(part.iteration, part.index, part.count).name:
                    raise ValueError(f"{path}: header says iteration {part.iteration}, part {part.index} of "
                                     f"{part.count}; expected what the file name says")
                if part.count != parts[0].count:
                    raise ValueError(f"{path}: part count {part.count}, expected {parts[0].count} as "
                                     f"{paths[0].name}")
            result[iteration] = parts
        return result

    def release(self, iteration: int) -> int:
        """Remove the part files of ``iteration`` (its slice is spooled whole, or given up).
        Returns how many were removed."""
        removed = 0
        for path in self.paths().get(int(iteration), []):
            path.unlink(missing_ok=True)
            removed += 1
        if removed:
            fsync_directory(self.directory)
        return removed

    def release_if_spooled(self, iteration: int, spooled: Path) -> int:
        """Remove the part files of ``iteration`` when ``spooled`` (its slice's spool file)
        exists: a failed spool write keeps the parts, which a restart then assembles again."""
        return self.release(iteration) if spooled.exists() else 0
