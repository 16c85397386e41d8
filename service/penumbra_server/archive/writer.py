"""Writing a run archive: create the group, append committed rows, update the run's state.

The writer is synchronous (zarr's sync API); the server calls it from one worker thread so the
event loop never blocks on disk. One writer per run group, never two: rows are appended at the
committed count, and a second writer would overwrite them.

Crash safety (a kill at any instruction): every zarr metadata file is replaced atomically; a
commit writes rows, then the root's ``committed_rows`` (the marker readers trust), then the
consolidated metadata (what ``xarray.open_zarr`` reads), so a kill leaves at worst rows past the
marker and consolidated metadata one commit behind, both invisible. Creating a group is
idempotent (arrays a killed creation left are reused), and :meth:`ArchiveWriter.open_existing`
repairs what a kill left: arrays cut back to the marker, uncounted groups removed.
"""

from __future__ import annotations

import shutil
import time
import warnings
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
import zarr

from .. import crash_points
from . import _layout as layout

__all__ = ["ArchiveWriter", "ArchiveError"]


class ArchiveError(RuntimeError):
    """The archive on disk is missing, belongs to another format, or a row is malformed."""


def _column_block(column: layout.Column, rows: Sequence[Mapping], row_kind: str) -> np.ndarray:
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


class ArchiveWriter:
    """Appends rows to one run's archive group. Use :meth:`create` or :meth:`open_existing`."""

    def __init__(self, group: zarr.Group, path: Path) -> None:
        self._group = group
        self.path = path
        attrs = dict(group.attrs)
        if attrs.get("penumbra_archive_version") != layout.ARCHIVE_FORMAT_VERSION:
            raise ArchiveError(
                f"{path}: attribute penumbra_archive_version is {attrs.get('penumbra_archive_version')!r}; "
                f"expected {layout.ARCHIVE_FORMAT_VERSION}"
            )
        self.run_id: str = attrs["run_id"]
        self.lmax: int = int(attrs["lmax"])
        #: Degree of each surface group (a common surface may have its own); the run's lmax else.
        self.surface_lmax: dict[str, int] = {label: int(v) for label, v in attrs.get("surface_lmax", {}).items()}
        self._attrs: dict = attrs
        self._committed: dict[str, int] = {k: int(v) for k, v in attrs["committed_rows"].items()}
        self._arrays: dict[str, zarr.Array] = {}

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
    ) -> "ArchiveWriter":
        """Create ``<archive_root>/<run_id>.zarr`` with empty arrays; fail if it exists."""
        path = layout.archive_path(archive_root, run_id)
        if path.exists():
            raise ArchiveError(f"{path}: an archive for run {run_id!r} already exists")
        path.parent.mkdir(parents=True, exist_ok=True)
        group = zarr.open_group(str(path), mode="w-", zarr_format=3)
        _create_columns(group.create_group(layout.SLICES_GROUP), layout.SLICE_COLUMNS, layout.TIME_DIMENSION)
        surfaces = group.create_group(layout.SURFACES_GROUP)
        columns = layout.surface_columns(lmax)
        for label in surface_labels:
            sub = surfaces.create_group(label)
            _create_columns(sub, columns, layout.TIME_DIMENSION)
            sub.update_attributes({"label": label, "lmax": int(lmax)})
        committed = {layout.SLICES_GROUP: 0}
        committed.update({layout.surface_group(label): 0 for label in surface_labels})
        group.update_attributes(
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
                # Bumped last by every commit; readers trust only these counts.
                "committed_rows": committed,
            }
        )
        _consolidate(group)
        return cls(group, path)

    @classmethod
    def open_existing(cls, path: str | Path) -> "ArchiveWriter":
        """Re-open an archive for appending (a restarted server continuing an open run), after
        repairing what a kill left half done (:meth:`repair`)."""
        path = Path(path)
        if not path.exists():
            raise ArchiveError(f"{path}: no archive there")
        # Not the consolidated copy: it may lag the marker by one commit and does not list what
        # a killed commit created.
        writer = cls(zarr.open_group(str(path), mode="r+", zarr_format=3, use_consolidated=False), path)
        writer.repair()
        return writer

    # -- state ------------------------------------------------------------------------------

    @property
    def attrs(self) -> dict:
        """A copy of the root attributes as last written."""
        return dict(self._attrs)

    @property
    def committed_rows(self) -> dict[str, int]:
        return dict(self._committed)

    def _array(self, group_path: str, column: layout.Column, row_dimension: str) -> zarr.Array:
        key = f"{group_path}/{column.name}"
        arr = self._arrays.get(key)
        if arr is None:
            try:
                arr = self._group[key]
            except KeyError:
                # A column added to the layout after this archive was created: made now, with
                # fill values for the rows already there.
                group = self._group[group_path]
                # Keep the group's own row dimension (older archives: "slice", "sample").
                existing = next((a for _, a in group.arrays()), None)
                if existing is not None and existing.metadata.dimension_names:
                    row_dimension = existing.metadata.dimension_names[0]
                arr = _create_column(group, column, row_dimension)
                rows = self._committed.get(group_path, 0)
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

    def repair(self) -> list[str]:
        """Undo what a killed commit left: arrays longer than their group's committed row count
        are cut back to it, groups holding arrays that ``committed_rows`` does not count (a
        creation the kill interrupted) are removed, and the consolidated metadata is rewritten.
        Idempotent. Returns what was repaired (one line each), empty when nothing was."""
        repaired = []
        counted = set(self._committed)
        for member_path, member in sorted(self._group.members(max_depth=None), key=lambda m: m[0]):
            if not isinstance(member, zarr.Array):
                continue
            group_path, _, name = member_path.rpartition("/")
            if group_path not in counted:
                continue
            rows = self._committed[group_path]
            if member.shape[0] > rows:
                member.resize((rows,) + member.shape[1:])
                repaired.append(f"{member_path}: cut back to its {rows} committed rows")
        half_made = {path.rpartition("/")[0] for path, member in self._group.members(max_depth=None)
                     if isinstance(member, zarr.Array)} - counted
        for group_path in sorted(half_made):
            shutil.rmtree(self.path / group_path, ignore_errors=True)
            repaired.append(f"{group_path}: removed (created by a commit that never completed)")
        self._arrays.clear()
        if repaired or not self._consolidated_is_current():
            _consolidate(self._group)
        return repaired

    def _consolidated_is_current(self) -> bool:
        """Whether the consolidated metadata shows every committed group with its committed rows
        (a kill between a commit's marker and its consolidation leaves it one commit behind)."""
        try:
            view = zarr.open_group(str(self.path), mode="r", zarr_format=3, use_consolidated=True)
            for group_path, rows in self._committed.items():
                arrays = list(view[group_path].arrays())
                if arrays and arrays[0][1].shape[0] != rows:
                    return False
        except Exception:  # missing or unreadable consolidated metadata: rewrite it
            return False
        return True

    # -- writing ----------------------------------------------------------------------------

    def add_surface(self, label: str, *, lmax: int | None = None) -> None:
        """Create ``surfaces/<label>`` for a surface not known when the run opened (no-op if present).

        ``lmax``: the surface's harmonic degree (default: the run's); recorded in the group's
        attribute ``lmax`` and in the root attribute ``surface_lmax``.
        """
        group_path = layout.surface_group(label)
        if group_path in self._committed:
            return
        lmax = int(lmax or self.lmax)
        # require_group and _create_columns reuse what a killed earlier attempt made.
        sub = self._group.require_group(layout.SURFACES_GROUP).require_group(label)
        _create_columns(sub, layout.surface_columns(lmax), layout.TIME_DIMENSION)
        sub.update_attributes({"label": label, "lmax": lmax})
        committed = dict(self._committed)
        committed[group_path] = 0
        new_attrs = dict(self._attrs)
        new_attrs["surface_labels"] = list(self._attrs["surface_labels"]) + [label]
        if lmax != self.lmax:
            self.surface_lmax[label] = lmax
            new_attrs["surface_lmax"] = dict(self.surface_lmax)
        new_attrs["committed_rows"] = committed
        self._group.update_attributes(new_attrs)
        self._attrs = new_attrs
        self._committed = committed
        _consolidate(self._group)

    def commit(
        self,
        *,
        slice_rows: Sequence[Mapping] = (),
        surface_rows: Mapping[str, Sequence[Mapping]] | None = None,
        group_rows: Mapping[str, Sequence[Mapping]] | None = None,
        attrs: Mapping | None = None,
    ) -> dict[str, int]:
        """Append rows and update root attributes as one unit visible to readers.

        Data rows are written first; the root attributes (``committed_rows`` and any ``attrs``
        given) are written last, in one metadata write. A crash in between leaves unreferenced
        trailing rows that readers ignore and the next commit overwrites.

        Args:
            slice_rows: mappings column name -> value for ``slices/`` (missing: fill value).
            surface_rows: label -> rows for ``surfaces/<label>``.
            group_rows: tracking group path (``tracks/<label>``, ``forecasts/<label>``,
                ``guidance/updates``, ``guidance/bodies``, ``guidance/regions``, ``windows``,
                ``events``, ``client_gaps``) -> rows; a group is created by the first commit that writes to it.
            attrs: root attributes to set in the same final write.
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
        created = [(group_path, cols, row_dimension) for group_path, _, cols, _, row_dimension in pending
                   if group_path not in committed]
        for group_path, cols, row_dimension in created:
            _create_columns(self._group.require_group(group_path), cols, row_dimension)
            committed[group_path] = 0
        if created:
            # New groups enter the consolidated metadata empty, before any row: xarray then opens
            # them (with no rows) whatever moment a kill interrupts the rest of this commit.
            _consolidate(self._group)
        for group_path, rows, cols, row_kind, row_dimension in pending:
            start = committed[group_path]
            stop = start + len(rows)
            for column in cols:
                block = _column_block(column, rows, row_kind)
                arr = self._array(group_path, column, row_dimension)
                if arr.shape[0] != stop:
                    arr.resize((stop,) + arr.shape[1:])
                arr[start:stop] = block
            committed[group_path] = stop
        crash_points.reached("archive-mid-commit")
        new_attrs = dict(self._attrs)
        new_attrs.update(attrs or {})
        new_attrs["committed_rows"] = committed
        self._group.update_attributes(new_attrs)
        self._attrs = new_attrs
        self._committed = committed
        crash_points.reached("archive-before-consolidate")
        _consolidate(self._group)
        return dict(committed)


def _consolidate(group: zarr.Group) -> None:
    """Write the consolidated metadata (after the committed counts): ``xarray.open_zarr`` then
    opens any group without a fallback warning and sees exactly the last commit's rows.
    The archive's own reader ignores it and trusts ``committed_rows``."""
    with warnings.catch_warnings():
        # zarr notes that consolidated metadata is not yet part of the v3 specification; the
        # archive stays readable without it (every zarr.json is still written).
        warnings.filterwarnings("ignore", message="Consolidated metadata is currently not part")
        zarr.consolidate_metadata(group.store)


def _create_column(group: zarr.Group, column: layout.Column, row_dimension: str) -> zarr.Array:
    arr = group.create_array(
        column.name,
        shape=(0,) + tuple(size for _, size in column.trailing),
        chunks=column.chunks(),
        dtype=str if column.dtype == "str" else column.dtype,
        fill_value=column.fill_value,
        dimension_names=column.dimension_names(row_dimension),
    )
    attrs = {}
    if column.unit:
        attrs["units"] = column.unit
    if column.description:
        attrs["description"] = column.description
    if attrs:
        arr.update_attributes(attrs)
    return arr


def _create_columns(group: zarr.Group, columns: Sequence[layout.Column], row_dimension: str) -> None:
    """Create the group's arrays, empty; arrays a killed earlier attempt made are reused (emptied)."""
    existing = dict(group.arrays())
    for index, column in enumerate(columns):
        if index == len(columns) // 2:
            crash_points.reached("archive-mid-group")
        arr = existing.get(column.name)
        if arr is None:
            _create_column(group, column, row_dimension)
        elif arr.shape[0]:
            arr.resize((0,) + arr.shape[1:])
