"""Writing a run archive: create the group, append committed rows, update the run's state.

The writer is synchronous (zarr's sync API); the server calls it from one worker thread so the
event loop never blocks on disk. One writer per run group, never two.

Write-behind: a commit is made durable as one small journal file (journal.py: written, flushed
to the disk, renamed) and returns; the zarr arrays receive the journal's rows in bulk later, when
the writer *folds* (:meth:`ArchiveWriter.fold`: when :class:`FoldPolicy`'s count of commits or
age is reached, when the run closes, at :meth:`ArchiveWriter.close` and whenever an archive is
reopened). The project's reader (reader.py) merges the unfolded journal, so it sees every
committed row at once; ``xarray.open_zarr`` sees the rows folded so far (all of them once the
run closed).

Crash safety (a kill at any instruction): a commit's journal file appears whole or not at all
(nothing of a commit is announced before it returned). A fold writes the rows into the arrays,
then the root's ``committed_rows`` (the marker readers trust) with ``journal_folded_through``
(the last commit folded), then the consolidated metadata (what ``xarray.open_zarr`` reads),
then removes the folded journal files: a kill leaves rows past the marker (invisible; the
journal still holds them), consolidated metadata one fold behind, or journal files already
folded (skipped by number). zarr replaces each file atomically. A group first written since
the last fold is created by the fold, before the marker counts it (until then its rows live in
the journal only). Creating a group is idempotent (arrays a killed creation left are reused),
and :meth:`ArchiveWriter.open_existing` repairs what a kill left: arrays cut back to the marker,
the journal folded, uncounted groups removed.
"""

from __future__ import annotations

import logging
import shutil
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
import zarr

from .. import crash_points
from . import _layout as layout
from ._zarr_io import (ArchiveError, column_block, consolidate, create_column, create_columns, create_groups,
                       members, write_blocks)
from .journal import (JOURNAL_DIRECTORY, JournalEntry, attrs_json, contiguous_entries, remove_entries,
                      remove_temporary, write_entry)

__all__ = ["ArchiveWriter", "ArchiveError", "FoldPolicy"]

log = logging.getLogger("penumbra.archive")


@dataclass(frozen=True)
class FoldPolicy:
    """When a writer folds its journal into the zarr arrays (besides closing and reopening).

    Attributes:
        commits: fold once the journal holds this many commits (1: after every commit).
        after_s: fold once the oldest unfolded commit is this many seconds old (checked at each
            commit; the server also folds a run idle this long).
    """

    commits: int = 64
    after_s: float = 30.0

    def __post_init__(self) -> None:
        if int(self.commits) < 1:
            raise ValueError(f"commits: expected at least 1 commit per fold, got {self.commits}")
        if not float(self.after_s) > 0:
            raise ValueError(f"after_s: expected a positive number of seconds, got {self.after_s}")


class ArchiveWriter:
    """Appends rows to one run's archive group. Use :meth:`create` or :meth:`open_existing`."""

    def __init__(self, group: zarr.Group, path: Path, fold_policy: FoldPolicy | None = None) -> None:
        self._group = group
        self.path = path
        self.fold_policy = fold_policy or FoldPolicy()
        root = dict(group.attrs)
        if root.get("penumbra_archive_version") != layout.ARCHIVE_FORMAT_VERSION:
            raise ArchiveError(
                f"{path}: attribute penumbra_archive_version is {root.get('penumbra_archive_version')!r}; "
                f"expected {layout.ARCHIVE_FORMAT_VERSION}"
            )
        #: The root attributes on disk and the rows the arrays hold (the last fold's).
        self._root: dict = root
        self._folded: dict[str, int] = {k: int(v) for k, v in root["committed_rows"].items()}
        self._journal_dir = path / JOURNAL_DIRECTORY
        #: Commits not folded yet, in order; the next commit's number.
        self._journal: list[JournalEntry] = []
        self._next_commit = int(root.get("journal_folded_through", 0)) + 1
        self._unfolded_since: float | None = None
        self._arrays: dict[str, zarr.Array] = {}
        self._listed: set[str] = set()
        self._checked: set[str] = set()
        self._set_state(root)

    def _set_state(self, attrs: dict) -> None:
        """Take ``attrs`` (root attributes after the last commit) as the run's state."""
        self._attrs: dict = attrs
        self._committed: dict[str, int] = {k: int(v) for k, v in attrs["committed_rows"].items()}
        self.run_id: str = attrs["run_id"]
        self.lmax: int = int(attrs["lmax"])
        #: Degree of each surface group (a common surface may have its own); the run's lmax else.
        self.surface_lmax: dict[str, int] = {label: int(v) for label, v in attrs.get("surface_lmax", {}).items()}

    # -- construction -----------------------------------------------------------------------

    @classmethod
    def create(
        cls,
        archive_root: str | Path,
        run_id: str,
        *,
        name: str,
        run_spec: Mapping,
        surface_labels: Sequence[str],
        lmax: int,
        software_version: str,
        created_unix_s: float | None = None,
        fold_policy: FoldPolicy | None = None,
    ) -> "ArchiveWriter":
        """Create ``<archive_root>/<run_id>.zarr`` with empty arrays; fail if it exists."""
        path = layout.archive_path(archive_root, run_id)
        if path.exists():
            raise ArchiveError(f"{path}: an archive for run {run_id!r} already exists")
        path.parent.mkdir(parents=True, exist_ok=True)
        group = zarr.open_group(str(path), mode="w-", zarr_format=3)
        create_columns(group.create_group(layout.SLICES_GROUP), layout.SLICE_COLUMNS, layout.TIME_DIMENSION)
        surfaces = group.create_group(layout.SURFACES_GROUP)
        columns = layout.surface_columns(lmax)
        for label in surface_labels:
            sub = surfaces.create_group(label)
            create_columns(sub, columns, layout.TIME_DIMENSION)
            sub.update_attributes({"label": label, "lmax": int(lmax)})
        committed = {layout.SLICES_GROUP: 0}
        committed.update({layout.surface_group(label): 0 for label in surface_labels})
        group.update_attributes(attrs_json(
            {
                "penumbra_archive_version": layout.ARCHIVE_FORMAT_VERSION,
                "run_id": run_id,
                "name": name,
                "state": "open",
                "created_unix_s": float(created_unix_s if created_unix_s is not None else time.time()),
                "closed_unix_s": None,
                "run_spec": dict(run_spec),
                "units": dict(layout.UNITS),
                "software_version": software_version,
                "surface_labels": list(surface_labels),
                "lmax": int(lmax),
                "next_event_seq": 1,
                "state_events": [],
                # Bumped last by every fold; readers trust only these counts (and the journal).
                "committed_rows": committed,
                "journal_folded_through": 0,
            }
        ))
        consolidate(group)
        return cls(group, path, fold_policy)

    @classmethod
    def open_existing(cls, path: str | Path, fold_policy: FoldPolicy | None = None) -> "ArchiveWriter":
        """Re-open an archive for appending (a restarted server continuing an open run), after
        repairing what a kill left half done and folding the journal (:meth:`repair`)."""
        path = Path(path)
        if not path.exists():
            raise ArchiveError(f"{path}: no archive there")
        # Not the consolidated copy: it may lag the marker by one fold and does not list what
        # a killed commit created.
        writer = cls(zarr.open_group(str(path), mode="r+", zarr_format=3, use_consolidated=False), path,
                     fold_policy)
        writer.repair()
        return writer

    # -- state ------------------------------------------------------------------------------

    @property
    def attrs(self) -> dict:
        """A copy of the root attributes after the last commit (folded or not)."""
        return dict(self._attrs)

    @property
    def committed_rows(self) -> dict[str, int]:
        """Rows committed per group (folded into the arrays or still in the journal)."""
        return dict(self._committed)

    @property
    def unfolded_commits(self) -> int:
        """Commits in the journal not yet folded into the arrays."""
        return len(self._journal)

    def fold_due(self) -> bool:
        """Whether the fold policy asks for a fold now."""
        if not self._journal:
            return False
        return (len(self._journal) >= self.fold_policy.commits
                or time.monotonic() - (self._unfolded_since or 0.0) >= self.fold_policy.after_s)

    def _group_layout(self, group_path: str) -> tuple[tuple[layout.Column, ...], str]:
        if group_path == layout.SLICES_GROUP:
            return layout.SLICE_COLUMNS, layout.TIME_DIMENSION
        head, _, label = group_path.partition("/")
        if head == layout.SURFACES_GROUP:
            return layout.surface_columns(self.surface_lmax.get(label, self.lmax)), layout.TIME_DIMENSION
        return layout.group_columns(group_path)

    def _array(self, group_path: str, column: layout.Column, row_dimension: str) -> zarr.Array:
        key = f"{group_path}/{column.name}"
        arr = self._arrays.get(key)
        if arr is None:
            if group_path not in self._listed:  # every array of the group opened in one listing
                self._listed.add(group_path)
                self._arrays.update({f"{group_path}/{name}": a for name, a in self._group[group_path].arrays()})
            arr = self._arrays.get(key)
        if arr is None or key not in self._checked:
            self._checked.add(key)
            if arr is None:
                # A column added to the layout after this archive was created: made now, with
                # fill values for the rows already there.
                group = self._group[group_path]
                # Keep the group's own row dimension (older archives: "slice", "sample").
                existing = next((a for _, a in group.arrays()), None)
                if existing is not None and existing.metadata.dimension_names:
                    row_dimension = existing.metadata.dimension_names[0]
                arr = create_column(group, column, row_dimension)
                rows = self._folded.get(group_path, 0)
                if rows:
                    arr.resize((rows,) + arr.shape[1:])
            trailing = tuple(size for _, size in column.trailing)
            if arr.shape[1:] != trailing and len(arr.shape) == 1 + len(trailing) and all(
                    old <= new for old, new in zip(arr.shape[1:], trailing)):
                # A column widened since this archive was written (multipoles n = 0..4 -> 0..8):
                # the rows already there keep their values; their new entries read as the fill value.
                arr.resize(arr.shape[:1] + trailing)
            self._arrays[key] = arr
        return arr

    def _forget_arrays(self) -> None:
        self._arrays.clear()
        self._listed.clear()
        self._checked.clear()

    # -- repair -----------------------------------------------------------------------------

    def repair(self) -> list[str]:
        """Undo what a kill left: arrays longer than their group's folded row count are cut
        back to it, the journal's commits are folded (files a killed write left unnamed, never
        returned, are removed; files folded already are skipped and removed), groups holding
        arrays that ``committed_rows`` does not count (a creation the kill interrupted) are
        removed, and the consolidated metadata is rewritten. Idempotent. Returns what was
        repaired (one line each), empty when nothing was."""
        repaired = [f"journal/{name}: removed (a commit the kill interrupted before it returned)"
                    for name in remove_temporary(self._journal_dir)]
        for member_path, member in sorted(members(self._group), key=lambda m: m[0]):
            if not isinstance(member, zarr.Array):
                continue
            group_path, _, name = member_path.rpartition("/")
            if group_path not in self._folded:
                continue
            rows = self._folded[group_path]
            if member.shape[0] > rows:
                member.resize((rows,) + member.shape[1:])
                repaired.append(f"{member_path}: cut back to its {rows} committed rows")
        self._forget_arrays()
        entries = contiguous_entries(self._journal_dir, self._next_commit - 1)
        if entries:
            self._journal = entries
            self._next_commit = entries[-1].commit + 1
            self._set_state(entries[-1].attrs)
            self._unfolded_since = time.monotonic()
            self.fold()
            repaired.append(f"journal: {len(entries)} commit(s) folded into the arrays")
        remove_entries(self._journal_dir, self._next_commit - 1)
        half_made = {path.rpartition("/")[0] for path, member in members(self._group)
                     if isinstance(member, zarr.Array)} - set(self._folded)
        for group_path in sorted(half_made):
            shutil.rmtree(self.path / group_path, ignore_errors=True)
            repaired.append(f"{group_path}: removed (created by a commit that never completed)")
        self._forget_arrays()
        if repaired or not self._consolidated_is_current():
            consolidate(self._group)
        return repaired

    def _consolidated_is_current(self) -> bool:
        """Whether the consolidated metadata shows every counted group with its folded rows
        (a kill between a fold's marker and its consolidation leaves it one fold behind)."""
        try:
            view = zarr.open_group(str(self.path), mode="r", zarr_format=3, use_consolidated=True)
            for group_path, rows in self._folded.items():
                arrays = list(view[group_path].arrays())
                if arrays and arrays[0][1].shape[0] != rows:
                    return False
        except Exception:  # missing or unreadable consolidated metadata: rewrite it
            return False
        return True

    # -- writing ----------------------------------------------------------------------------

    def _journal_commit(self, groups: dict, attrs: dict, fold: bool | None, closing: bool = False) -> dict[str, int]:
        """Make one commit durable in the journal, then take it as the run's state; fold when
        ``fold`` is True, or when None and the policy asks (a commit closing the run always)."""
        # The root's own record of the folds is no part of the run's state.
        attrs = {key: value for key, value in attrs.items() if key != "journal_folded_through"}
        entry = JournalEntry(self._next_commit, attrs_json(attrs), groups)
        write_entry(self._journal_dir, entry, before_rename=lambda: crash_points.reached("archive-mid-commit"))
        crash_points.reached("archive-journal-written")
        self._journal.append(entry)
        self._next_commit += 1
        if self._unfolded_since is None:
            self._unfolded_since = time.monotonic()
        self._set_state(entry.attrs)
        if fold or (fold is None and self.fold_due()) or closing:
            try:
                self.fold()
            except Exception:  # the commit is durable in the journal: the next fold tries again
                log.exception("%s: folding the journal into the arrays failed; it is tried again later", self.path)
        return dict(self._committed)

    def add_surface(self, label: str, *, lmax: int | None = None) -> None:
        """Create ``surfaces/<label>`` for a surface not known when the run opened (no-op if present).

        ``lmax``: the surface's harmonic degree (default: the run's); recorded in the group's
        attribute ``lmax`` and in the root attribute ``surface_lmax``.
        """
        group_path = layout.surface_group(label)
        if group_path in self._committed:
            return
        lmax = int(lmax or self.lmax)
        # A commit like any other (the group's arrays are made by the next fold).
        new_attrs = dict(self._attrs, surface_labels=list(self._attrs["surface_labels"]) + [label])
        if lmax != self.lmax:
            new_attrs["surface_lmax"] = dict(self.surface_lmax, **{label: lmax})
        new_attrs["committed_rows"] = dict(self._committed, **{group_path: 0})
        self._journal_commit({}, new_attrs, fold=False)

    def commit(
        self,
        *,
        slice_rows: Sequence[Mapping] = (),
        surface_rows: Mapping[str, Sequence[Mapping]] | None = None,
        group_rows: Mapping[str, Sequence[Mapping]] | None = None,
        attrs: Mapping | None = None,
        fold: bool | None = None,
    ) -> dict[str, int]:
        """Append rows and update root attributes as one unit, durable when this returns.

        The unit is one journal file; the zarr arrays receive it at the next fold (``fold``:
        True folds now, False not now, None (default) when the :class:`FoldPolicy` asks; a
        commit setting ``state`` to "closed" always folds). Readers of the project
        (:func:`~penumbra_server.archive.open_archive`) see it at once.

        Args:
            slice_rows: mappings column name -> value for ``slices/`` (missing: fill value).
            surface_rows: label -> rows for ``surfaces/<label>``.
            group_rows: tracking group path (``tracks/<label>``, ``forecasts/<label>``,
                ``guidance/updates``, ``guidance/bodies``, ``guidance/regions``, ``windows``,
                ``events``, ``client_gaps``) -> rows; a group is created by the first commit that writes to it.
            attrs: root attributes to set with the rows.
            fold: see above.
        Returns:
            The new committed row counts.
        """
        pending: list[tuple[str, Sequence[Mapping], tuple[layout.Column, ...], str, str]] = []
        if slice_rows:
            pending.append((layout.SLICES_GROUP, slice_rows, layout.SLICE_COLUMNS, "slice", layout.TIME_DIMENSION))
        for label, rows in (surface_rows or {}).items():
            group_path = layout.surface_group(label)
            if group_path not in self._committed:
                raise ArchiveError(f"surface_rows: unknown surface label {label!r}; the archive has "
                                   f"{', '.join(self._attrs['surface_labels'])}")
            if rows:
                columns = layout.surface_columns(self.surface_lmax.get(label, self.lmax))
                pending.append((group_path, rows, columns, f"surface {label!r}", layout.TIME_DIMENSION))
        for group_path, rows in (group_rows or {}).items():
            try:
                cols, row_dimension = layout.group_columns(group_path)
            except KeyError as exc:
                raise ArchiveError(f"group_rows: {exc.args[0]}") from None
            if rows:
                pending.append((group_path, rows, cols, f"{group_path!r}", row_dimension))
        committed = dict(self._committed)
        groups: dict[str, tuple[int, dict[str, np.ndarray]]] = {}
        for group_path, rows, cols, row_kind, _ in pending:  # every row checked before anything is written
            groups[group_path] = (committed.get(group_path, 0),
                                  {column.name: column_block(column, rows, row_kind) for column in cols})
        # A group not written before is made by the next fold (its rows wait in the journal).
        for group_path, rows, *_ in pending:
            committed[group_path] = committed.get(group_path, 0) + len(rows)
        new_attrs = dict(self._attrs)
        new_attrs.update(attrs or {})
        new_attrs["committed_rows"] = committed
        return self._journal_commit(groups, new_attrs, fold, closing=(attrs or {}).get("state") == "closed")

    def fold(self) -> None:
        """Write the journal's commits into the zarr arrays in one bulk write per column, then
        the root's counts, then the consolidated metadata, then remove the folded journal files
        (the order the module docstring argues crash-safe). No-op with nothing to fold."""
        if not self._journal:
            return
        entries = self._journal
        parts: dict[str, list[tuple[int, dict[str, np.ndarray]]]] = {}
        for entry in entries:
            for group_path, start_blocks in entry.groups.items():
                parts.setdefault(group_path, []).append(start_blocks)
        last = entries[-1]
        new_groups = []
        for group_path, rows in last.attrs["committed_rows"].items():
            if group_path not in self._folded:
                # Groups first written since the last fold (and surfaces added): made now as long
                # as their rows, counted by the root below; require_group and create_groups reuse
                # what a killed fold made.
                cols, row_dimension = self._group_layout(group_path)
                head, _, label = group_path.partition("/")
                sub = self._group.require_group(group_path)
                if head == layout.SURFACES_GROUP:
                    sub.update_attributes({"label": label, "lmax": self.surface_lmax.get(label, self.lmax)})
                new_groups.append((sub, cols, row_dimension, int(rows)))
                self._listed.discard(group_path)  # listed again, with the arrays made now
        if new_groups:
            create_groups(new_groups)
        writes = []
        for group_path, pieces in parts.items():
            cols, row_dimension = self._group_layout(group_path)
            start = self._folded.get(group_path, 0)
            stop = start
            for piece_start, blocks in pieces:
                if piece_start != stop:
                    raise ArchiveError(f"{self.path}: journal: {group_path} continues at row {piece_start}, "
                                       f"expected {stop}")
                stop += len(next(iter(blocks.values()))) if blocks else 0
            if stop != int(last.attrs["committed_rows"].get(group_path, -1)):
                raise ArchiveError(f"{self.path}: journal: {group_path} has {stop} rows, its last commit counts "
                                   f"{last.attrs['committed_rows'].get(group_path)}")
            for column in cols:
                block = np.concatenate([_fit(blocks.get(column.name), column, blocks) for _, blocks in pieces])
                writes.append((self._array(group_path, column, row_dimension), start, stop, block))
        write_blocks(writes)
        crash_points.reached("archive-mid-fold")
        root = dict(last.attrs)
        root["journal_folded_through"] = last.commit
        self._group.update_attributes(root)
        self._root = root
        self._folded = {k: int(v) for k, v in root["committed_rows"].items()}
        crash_points.reached("archive-before-consolidate")
        consolidate(self._group)
        crash_points.reached("archive-before-journal-trim")
        remove_entries(self._journal_dir, last.commit)
        self._journal = []
        self._unfolded_since = None

    def close(self) -> None:
        """Fold what the journal holds: the zarr arrays then hold every committed row."""
        self.fold()


def _fit(block: np.ndarray | None, column: layout.Column, blocks: Mapping[str, np.ndarray]) -> np.ndarray:
    """``block`` shaped as ``column``'s rows (a column missing from a journal written before it
    existed: fill values; a narrower one: padded with the fill value)."""
    rows = len(next(iter(blocks.values())))
    trailing = tuple(size for _, size in column.trailing)
    dtype = object if column.dtype == "str" else column.dtype
    if block is not None and block.shape[1:] == trailing:
        return block
    out = np.full((rows,) + trailing, column.fill_value, dtype=dtype)
    if block is not None and block.ndim == out.ndim:
        out[tuple(slice(0, n) for n in block.shape)] = block
    return out
