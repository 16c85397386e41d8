"""The archive's write-behind journal: commits durable in one small file each, folded into the
zarr arrays in bulk later (writer.py).

Layout: ``<run_id>.zarr/journal/<commit:012d>.commit``, one file per commit, numbered from 1 on.
A file is ``PNJ1``, an 8-byte little-endian header length, a JSON header, then the numeric
column blocks raw (little-endian, C order). The header holds ``commit`` (its number), ``attrs``
(the run's root attributes after the commit, ``committed_rows`` included), ``crc32`` of the
blocks and ``groups``: per group written, its path, ``start`` (the group's committed rows before
the commit), ``rows``, and per column its name, dtype, shape and either the block's byte
``offset`` or, for text columns, the ``values`` as JSON strings. No pickle anywhere.

A file is written to ``.<name>.tmp``, flushed to the disk (fsync), renamed and the directory
flushed: a kill leaves no file (the commit never returned, nothing of it was announced) or a
complete one. zarr ignores the directory (it holds no ``zarr.json``).
"""

from __future__ import annotations

import json
import os
import re
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping

import numpy as np

from ..durable import fsync_directory

__all__ = ["JOURNAL_DIRECTORY", "JournalEntry", "JournalError", "contiguous_entries", "read_entry",
           "remove_entries", "remove_temporary", "write_entry", "list_commits"]

JOURNAL_DIRECTORY = "journal"
_MAGIC = b"PNJ1"
_LENGTH = 8
_NAME = re.compile(r"^(\d{12})\.commit$")
#: Numeric dtypes a block may have (bool, signed and unsigned integers, floats).
_KINDS = "biuf"


class JournalError(ValueError):
    """A journal file is malformed (names the file and what is wrong)."""


@dataclass(frozen=True, eq=False)
class JournalEntry:
    """One committed unit: its number, the root attributes after it, and its rows.

    Attributes:
        commit: the commit's number (1, 2, ... in commit order).
        attrs: root attributes after the commit, including ``committed_rows``.
        groups: group path -> (start row, {column name -> array of shape (rows, *trailing)});
            text columns are object arrays of str.
    """

    commit: int
    attrs: dict
    groups: dict[str, tuple[int, dict[str, np.ndarray]]] = field(default_factory=dict)

    def rows(self, group_path: str) -> int:
        start_blocks = self.groups.get(group_path)
        if not start_blocks:
            return 0
        return len(next(iter(start_blocks[1].values()))) if start_blocks[1] else 0


def _file_name(commit: int) -> str:
    return f"{commit:012d}.commit"


def write_entry(directory: Path, entry: JournalEntry, before_rename=None) -> Path:
    """Write ``entry`` durably as ``directory/<commit>.commit`` (tmp, fsync, rename, directory
    fsync); ``before_rename()`` is called with the temporary file flushed (a crash point)."""
    directory.mkdir(parents=True, exist_ok=True)
    payload: list[bytes] = []
    offset = 0
    groups = []
    for group_path, (start, blocks) in entry.groups.items():
        columns = []
        for name, block in blocks.items():
            if block.dtype == object or block.dtype.kind in "UT":
                columns.append({"name": name, "dtype": "str", "shape": list(block.shape),
                                "values": [str(v) for v in block.reshape(-1)]})
                continue
            raw = np.ascontiguousarray(block, dtype=block.dtype.newbyteorder("<")).tobytes()
            columns.append({"name": name, "dtype": block.dtype.newbyteorder("<").str, "shape": list(block.shape),
                            "offset": offset, "nbytes": len(raw)})
            payload.append(raw)
            offset += len(raw)
        groups.append({"path": group_path, "start": int(start), "columns": columns})
    body = b"".join(payload)
    header = json.dumps({"commit": int(entry.commit), "attrs": entry.attrs, "groups": groups,
                         "crc32": zlib.crc32(body)}).encode()
    final = directory / _file_name(entry.commit)
    temporary = directory / f".{final.name}.tmp"
    with open(temporary, "wb") as f:
        f.write(_MAGIC + len(header).to_bytes(_LENGTH, "little") + header)
        f.write(body)
        f.flush()
        os.fsync(f.fileno())
    if before_rename is not None:
        before_rename()
    os.replace(temporary, final)
    fsync_directory(directory)
    return final


def read_entry(path: Path) -> JournalEntry:
    """The entry of one journal file (JournalError naming the file when it is malformed)."""
    data = path.read_bytes()
    if data[:4] != _MAGIC or len(data) < 4 + _LENGTH:
        raise JournalError(f"{path}: not a journal file (expected it to start with {_MAGIC!r})")
    length = int.from_bytes(data[4:4 + _LENGTH], "little")
    start = 4 + _LENGTH
    try:
        header = json.loads(data[start:start + length])
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise JournalError(f"{path}: header is not JSON ({exc})") from None
    body = memoryview(data)[start + length:]
    if zlib.crc32(body) != header.get("crc32"):
        raise JournalError(f"{path}: crc32 of the column blocks does not match the header")
    groups: dict[str, tuple[int, dict[str, np.ndarray]]] = {}
    for group in header["groups"]:
        blocks = {}
        for column in group["columns"]:
            shape = tuple(int(n) for n in column["shape"])
            if column["dtype"] == "str":
                values = np.empty(len(column["values"]), dtype=object)
                values[:] = [str(v) for v in column["values"]]
                blocks[column["name"]] = values.reshape(shape)
                continue
            dtype = np.dtype(column["dtype"])
            offset, nbytes = int(column["offset"]), int(column["nbytes"])
            if dtype.kind not in _KINDS or offset < 0 or offset + nbytes > len(body) \
                    or nbytes != dtype.itemsize * int(np.prod(shape)):
                raise JournalError(f"{path}: column {group['path']}/{column['name']}: block of dtype "
                                   f"{column['dtype']}, shape {shape} does not fit its {nbytes} bytes at {offset}")
            blocks[column["name"]] = np.frombuffer(body, dtype=dtype, count=int(np.prod(shape)),
                                                   offset=offset).reshape(shape).astype(dtype.newbyteorder("="))
        groups[group["path"]] = (int(group["start"]), blocks)
    return JournalEntry(int(header["commit"]), header["attrs"], groups)


def list_commits(directory: Path) -> list[int]:
    """Numbers of the journal files in ``directory``, ascending (none: empty)."""
    try:
        names = os.listdir(directory)
    except FileNotFoundError:
        return []
    return sorted(int(m.group(1)) for m in map(_NAME.match, names) if m)


def contiguous_entries(directory: Path, after: int) -> list[JournalEntry]:
    """The entries numbered ``after`` + 1, + 2, ... up to the first one missing (files at or
    below ``after`` are folded already; one past a gap was written after the listing began)."""
    entries = []
    expected = after + 1
    for commit in list_commits(directory):
        if commit < expected:
            continue
        if commit != expected:
            break
        entries.append(read_entry(directory / _file_name(commit)))
        expected += 1
    return entries


def remove_entries(directory: Path, through: int) -> None:
    """Remove the journal files numbered up to ``through`` (folded into the arrays)."""
    removed = False
    for commit in list_commits(directory):
        if commit <= through:
            (directory / _file_name(commit)).unlink(missing_ok=True)
            removed = True
    if removed:
        fsync_directory(directory)


def remove_temporary(directory: Path) -> list[str]:
    """Remove temporary files a killed write left (never renamed: their commit never returned)."""
    removed = []
    try:
        names = os.listdir(directory)
    except FileNotFoundError:
        return removed
    for name in names:
        if name.startswith(".") and name.endswith(".tmp"):
            (directory / name).unlink(missing_ok=True)
            removed.append(name)
    return removed


def attrs_json(attrs: Mapping) -> dict:
    """``attrs`` as plain JSON values (what zarr stores), so the journal's copy reads back equal."""
    return json.loads(json.dumps(attrs, default=_plain))


def _plain(value):
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"attrs: {type(value).__name__} is not JSON serialisable")
