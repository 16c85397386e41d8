"""Reading run archives: a consistent prefix of a live or finished run.

A view reads the root attributes once and trusts only their ``committed_rows``: rows beyond
the counts may be half written. The rows of commits not yet folded into the zarr arrays are read
from the archive's journal (journal.py) and appended, so a view shows every committed row. zarr
readers keep the shapes they opened with, so call :func:`open_archive` again to see rows
committed since.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import zarr

from . import _layout as layout
from .displacement import ArchivedDisplacement, displacement_from_row
from .journal import JOURNAL_DIRECTORY, JournalEntry, contiguous_entries

__all__ = ["ArchiveView", "ArchiveSummary", "open_archive", "list_archives", "ArchivedDisplacement",
           "displacement_from_row"]


def _open_root(path: Path, *, attempts: int = 5) -> zarr.Group:
    # zarr writes metadata files atomically (temp file + rename), so a reader never sees a torn
    # file; a retry covers the rare case of a directory listed before its metadata exists.
    for attempt in range(attempts):
        try:
            # Not the consolidated copy: it may lag the committed counts by one commit.
            return zarr.open_group(str(path), mode="r", zarr_format=3, use_consolidated=False)
        except (FileNotFoundError, json.JSONDecodeError, KeyError):
            if attempt == attempts - 1:
                raise
            time.sleep(0.05)
    raise AssertionError("unreachable")


def _open_consistent(path: Path, *, attempts: int = 20) -> tuple[zarr.Group, list[JournalEntry]]:
    """The root group and the journal's commits after its last fold, read consistently: a fold
    that completed meanwhile (its journal files may be gone) makes the read start again."""
    for _ in range(attempts):
        group = _open_root(path)
        through = int(group.attrs.get("journal_folded_through", 0))
        try:
            entries = contiguous_entries(path / JOURNAL_DIRECTORY, through)
        except FileNotFoundError:  # removed by a fold between the listing and the read
            continue
        if int(_open_root(path).attrs.get("journal_folded_through", 0)) == through:
            return group, entries
    raise RuntimeError(f"{path}: the archive was folded during each of {attempts} reads; try again")


class ArchiveView:
    """A snapshot of one run archive: attributes plus committed rows of every array.

    Attributes:
        path: the run group's directory.
        attrs: root attributes (dict), read once when the view was made.
        committed_rows: group path -> rows visible through this view.
    """

    def __init__(self, path: Path, group: zarr.Group, journal: list[JournalEntry] | None = None) -> None:
        self.path = path
        self._group = group
        root: dict = dict(group.attrs)
        if root.get("penumbra_archive_version") != layout.ARCHIVE_FORMAT_VERSION:
            raise ValueError(
                f"{path}: not a Penumbra run archive (penumbra_archive_version="
                f"{root.get('penumbra_archive_version')!r}, expected {layout.ARCHIVE_FORMAT_VERSION})"
            )
        #: Rows in the zarr arrays per group (the last fold's counts); the rest is in the journal.
        self._folded_rows: dict[str, int] = {k: int(v) for k, v in root["committed_rows"].items()}
        self._journal = list(journal or ())
        self.attrs: dict = dict(self._journal[-1].attrs) if self._journal else root
        self.committed_rows: dict[str, int] = {k: int(v) for k, v in self.attrs["committed_rows"].items()}

    @property
    def run_id(self) -> str:
        return self.attrs["run_id"]

    @property
    def name(self) -> str:
        return self.attrs.get("name", "")

    @property
    def state(self) -> str:
        return self.attrs.get("state", "")

    @property
    def run_spec(self) -> dict:
        return dict(self.attrs["run_spec"])

    @property
    def lmax(self) -> int:
        return int(self.attrs["lmax"])

    @property
    def surface_labels(self) -> tuple[str, ...]:
        return tuple(self.attrs["surface_labels"])

    def surface_lmax(self, label: str) -> int:
        """Harmonic degree of ``surfaces/<label>`` (a common surface may have its own; else lmax)."""
        return int(self.attrs.get("surface_lmax", {}).get(label, self.lmax))

    def _zarr_arrays(self, group_path: str) -> dict:
        try:
            return dict(self._group[group_path].arrays())
        except KeyError:  # created by a commit still in the journal
            return {}

    def _columns(self, group_path: str) -> dict[str, np.ndarray]:
        rows = self._folded_rows.get(group_path, 0)
        folded = {name: _plain(arr[:rows]) for name, arr in self._zarr_arrays(group_path).items()}
        parts = [(rows, folded)]
        for entry in self._journal:
            if group_path in entry.groups:
                parts.append((entry.rows(group_path), entry.groups[group_path][1]))
        return _merge_parts(parts) if len(parts) > 1 else dict(sorted(folded.items()))

    def slices(self) -> dict[str, np.ndarray]:
        """Columns of ``slices/`` (see the layout), committed rows only."""
        return self._columns(layout.SLICES_GROUP)

    def surface(self, label: str) -> dict[str, np.ndarray]:
        """Columns of ``surfaces/<label>``, committed rows only."""
        group_path = layout.surface_group(label)
        if group_path not in self.committed_rows:
            raise KeyError(f"label: no surface {label!r} in {self.path}; it has {', '.join(self.surface_labels)}")
        return self._columns(group_path)

    def displacements(self, label: str) -> list[ArchivedDisplacement | None]:
        """Per committed row of ``surfaces/<label>``, the surface in the normal-displacement
        representation (x = x_ref + h n_ref; ``.surface()`` makes the numerics object), or None
        for a star-shaped surface, a row not found, or an archive without those columns."""
        cols = self.surface(label)
        return [displacement_from_row({name: values[i] for name, values in cols.items()})
                for i in range(len(cols["iteration"]))]

    def _dataset(self, group_path: str, row_dimension: str):
        import xarray as xr  # optional: only the report and tests need it

        arrays = self._zarr_arrays(group_path)
        described = _layout_columns(group_path, self)
        row_dim = next((a.metadata.dimension_names[0] for a in arrays.values() if a.metadata.dimension_names),
                       row_dimension or "row")
        variables = {}
        for name, values in self._columns(group_path).items():
            if name in arrays:
                dims, attrs = tuple(arrays[name].metadata.dimension_names or ()), dict(arrays[name].attrs)
            elif name in described:  # a column of the layout only the journal holds yet
                column = described[name]
                dims = tuple(column.dimension_names(row_dim))
                attrs = {key: value for key, value in (("units", column.unit), ("description", column.description))
                         if value}
            else:
                dims, attrs = (row_dim,) + tuple(f"{name}_{axis}" for axis in range(1, values.ndim)), {}
            variables[name] = xr.Variable(dims, values, attrs=attrs)
        ds = xr.Dataset(variables, attrs={"run_id": self.run_id, "group": group_path, "row_dimension": row_dimension})
        if "time" in ds.variables and len(ds["time"].dims) == 1 and "time" not in ds.coords:
            row = ds["time"].dims[0]
            ds = ds.set_coords("time")
            if row in (layout.TIME_DIMENSION, "slice", "sample"):  # time series written before the rename
                ds = ds.swap_dims({row: "time"})
            ds.attrs["row_dimension"] = ds["time"].dims[0]
        return ds

    # -- tracking, guidance and windows ----------------------------------------------------------

    def _labels_under(self, head: str) -> tuple[str, ...]:
        prefix = head + "/"
        return tuple(path[len(prefix):] for path in self.committed_rows if path.startswith(prefix))

    @property
    def track_labels(self) -> tuple[str, ...]:
        """Labels with a track (bodies, and "common" once found)."""
        return self._labels_under(layout.TRACKS_GROUP)

    @property
    def forecast_labels(self) -> tuple[str, ...]:
        return self._labels_under(layout.FORECASTS_GROUP)

    def group(self, group_path: str) -> dict[str, np.ndarray]:
        """Committed columns of any group of the run, e.g. ``tracks/A`` or ``windows``.

        A tracking group not written yet reads as empty columns (no error): a run that has not
        produced guidance yet simply has none.
        """
        if group_path in self.committed_rows:
            return self._columns(group_path)
        try:
            columns, _ = layout.group_columns(group_path)
        except KeyError:
            raise KeyError(f"group_path: no group {group_path!r} in {self.path}") from None
        return {c.name: _empty(c) for c in columns}

    def track(self, label: str, *, source: str | None = None) -> dict[str, np.ndarray]:
        """``tracks/<label>`` in time order: iteration, time, position (n, 3), source (1 horizon,
        2 puncture), uncertainty, order, event_seq. ``source="horizon"`` or ``"puncture"`` keeps
        those points only."""
        cols = self.group(f"{layout.TRACKS_GROUP}/{label}")
        if source is not None:
            if source not in layout.TRACK_SOURCES:
                raise ValueError(f"source: expected one of {sorted(layout.TRACK_SOURCES)} or None, got {source!r}")
            keep = cols["source"] == layout.TRACK_SOURCES[source]
            cols = {name: values[keep] for name, values in cols.items()}
        order = np.argsort(cols["time"], kind="stable")
        return {name: values[order] for name, values in cols.items()}

    def forecasts(self, label: str) -> dict[str, np.ndarray]:
        """``forecasts/<label>``: one row per forecast issued (after each slice): iteration, time,
        model, fit_from, fit_until, lead_time (n, leads), position (n, leads, 3), uncertainty
        (n, leads), reason, event_seq. A cone for the report: position +- uncertainty."""
        return self.group(f"{layout.FORECASTS_GROUP}/{label}")

    def guidance(self) -> dict[str, dict[str, np.ndarray]]:
        """{"updates", "bodies", "regions"} columns; bodies and regions point at their update by
        ``event_seq``. Use :meth:`guidance_regions_at` for one update's regions."""
        return {
            "updates": self.group(layout.GUIDANCE_UPDATES_GROUP),
            "bodies": self.group(layout.GUIDANCE_BODIES_GROUP),
            "regions": self.group(layout.GUIDANCE_REGIONS_GROUP),
        }

    def guidance_regions_at(self, event_seq: int, *, level: int | None = None) -> list[dict]:
        """The regions of the guidance announced as ``event_seq`` (one level or all), as dicts."""
        cols = self.group(layout.GUIDANCE_REGIONS_GROUP)
        keep = cols["event_seq"] == int(event_seq)
        if level is not None:
            keep &= cols["level"] == int(level)
        return [{name: values[i] for name, values in cols.items()} for i in np.nonzero(keep)[0]]

    def windows(self) -> dict[str, np.ndarray]:
        """``windows``: one row per data window wanted: iteration, time, valid_from, valid_until,
        name, lower (n, 3), upper (n, 3), growth, extra_nodes, reason, event_seq."""
        return self.group(layout.WINDOWS_GROUP)

    def tracking_events(self) -> dict[str, np.ndarray]:
        """``events``: the tracking and guidance events (seq, kind, iteration, time, label,
        message, wire, archived_unix_s); warnings and "common horizon formed" live only here."""
        return self.group(layout.EVENTS_GROUP)

    def formation(self) -> dict[str, np.ndarray]:
        """``formation``: one row per constant-expansion search of a pair before its common
        horizon formed (iteration, time, c_min_found, c_min and c_min_error (1/M), mean_radius,
        centre (n, 3), forecast_available, formation_time and formation_time_uncertainty (M),
        based_on, message, wall_time_s, event_seq). Empty columns when there was none."""
        return self.group(layout.FORMATION_GROUP)

    def client_gaps(self) -> dict[str, np.ndarray]:
        """``client_gaps``: one row per range of slices the client dropped while its link was
        down (gap_index, gap_id, iteration_first, iteration_last, count, reason code, time_first,
        time_last (M), start_unix_s, end_unix_s (client wall clock), cause, archived_unix_s,
        event_seq). Rows of one outage share ``gap_index``; an outage without drops is one row
        with count 0. Empty columns when the client never recorded a gap."""
        return self.group(layout.CLIENT_GAPS_GROUP)

    def client_gap_list(self) -> list[dict]:
        """The gaps as one dict per outage: gap_index, gap_id, start_unix_s, end_unix_s, cause,
        event_seq, slices_dropped and ``ranges`` (dicts with iteration_first, iteration_last,
        count, reason (a name of CLIENT_DROP_REASONS), time_first, time_last)."""
        cols = self.client_gaps()
        names = {code: name for name, code in layout.CLIENT_DROP_REASONS.items()}
        gaps: dict[int, dict] = {}
        for i in range(len(cols["gap_index"])):
            index = int(cols["gap_index"][i])
            gap = gaps.setdefault(index, {
                "gap_index": index, "gap_id": str(cols["gap_id"][i]), "start_unix_s": float(cols["start_unix_s"][i]),
                "end_unix_s": float(cols["end_unix_s"][i]), "cause": str(cols["cause"][i]),
                "event_seq": int(cols["event_seq"][i]), "slices_dropped": 0, "ranges": []})
            count = int(cols["count"][i])
            if count > 0:
                gap["slices_dropped"] += count
                gap["ranges"].append({
                    "iteration_first": int(cols["iteration_first"][i]), "iteration_last": int(cols["iteration_last"][i]),
                    "count": count, "reason": names.get(int(cols["reason"][i]), str(int(cols["reason"][i]))),
                    "time_first": float(cols["time_first"][i]), "time_last": float(cols["time_last"][i])})
        return [gaps[k] for k in sorted(gaps)]

    def group_dataset(self, group_path: str, row_dimension: str | None = None):
        """Any committed group as an :class:`xarray.Dataset` (e.g. ``tracks/A``, ``windows``)."""
        if group_path not in self.committed_rows:
            raise KeyError(f"group_path: no committed group {group_path!r} in {self.path}")
        if row_dimension is None:
            try:
                row_dimension = layout.group_columns(group_path)[1]
            except KeyError:
                row_dimension = ""
        return self._dataset(group_path, row_dimension)

    def surface_dataset(self, label: str):
        """``surfaces/<label>`` as an :class:`xarray.Dataset` over dimension ``time`` (its
        coordinate: the slice times), also for archives written with the older name "sample"."""
        self.surface(label)  # validates the label
        return self._dataset(layout.surface_group(label), layout.TIME_DIMENSION)

    def slices_dataset(self):
        """``slices/`` as an :class:`xarray.Dataset` over dimension ``time`` (older archives: "slice")."""
        return self._dataset(layout.SLICES_GROUP, layout.TIME_DIMENSION)


def _plain(values) -> np.ndarray:
    """A column as a plain numpy array; variable-length strings as an object array of str."""
    arr = np.asarray(values)
    if arr.dtype.kind in ("T", "U", "O"):
        return arr.astype(object)
    return arr


def _merge_parts(parts: list[tuple[int, dict[str, np.ndarray]]]) -> dict[str, np.ndarray]:
    """Columns of consecutive row ranges (the folded arrays, then each journal commit) joined;
    a column missing from a range (older layout) reads as its fill value there, a narrower
    one is padded with it."""
    names = sorted(set().union(*(columns for _, columns in parts)))
    merged = {}
    for name in names:
        reference = next(columns[name] for _, columns in reversed(parts) if name in columns)
        dtype = object if reference.dtype.kind in "OTU" else reference.dtype
        trailing = reference.shape[1:]
        pieces = []
        for rows, columns in parts:
            piece = columns.get(name)
            if piece is not None and piece.shape[1:] == trailing:
                pieces.append(_plain(piece))
                continue
            filled = np.full((rows,) + trailing, layout.fill_value_of(np.dtype(dtype)), dtype=dtype)
            if piece is not None and piece.ndim == filled.ndim:
                filled[tuple(slice(0, min(a, b)) for a, b in zip(piece.shape, filled.shape))] = \
                    piece[tuple(slice(0, min(a, b)) for a, b in zip(piece.shape, filled.shape))]
            pieces.append(filled)
        merged[name] = np.concatenate(pieces) if pieces else reference[:0]
    return merged


def _layout_columns(group_path: str, view: "ArchiveView") -> dict[str, layout.Column]:
    """The layout's columns of ``group_path`` by name (empty for a path the layout lacks)."""
    head, _, label = group_path.partition("/")
    if group_path == layout.SLICES_GROUP:
        columns = layout.SLICE_COLUMNS
    elif head == layout.SURFACES_GROUP:
        columns = layout.surface_columns(view.surface_lmax(label))
    else:
        try:
            columns = layout.group_columns(group_path)[0]
        except KeyError:
            columns = ()
    return {column.name: column for column in columns}


def _empty(column: layout.Column) -> np.ndarray:
    shape = (0,) + tuple(size for _, size in column.trailing)
    return np.zeros(shape, dtype=object if column.dtype == "str" else column.dtype)


def open_archive(path_or_root: str | Path, run_id: str | None = None) -> ArchiveView:
    """Open a run archive by its path, or by ``(archive_root, run_id)``."""
    path = Path(path_or_root)
    if run_id is not None:
        path = layout.archive_path(path, run_id)
    if not path.exists():
        raise FileNotFoundError(f"{path}: no run archive there")
    group, journal = _open_consistent(path)
    return ArchiveView(path, group, journal)


@dataclass(frozen=True)
class ArchiveSummary:
    """One line of :func:`list_archives`."""

    run_id: str
    name: str
    state: str
    path: Path
    created_unix_s: float
    slices: int
    surfaces: dict[str, int]


def list_archives(archive_root: str | Path) -> list[ArchiveSummary]:
    """Every run archive under ``archive_root``, newest first (unreadable ones are skipped)."""
    root = Path(archive_root)
    found: list[ArchiveSummary] = []
    if not root.exists():
        return found
    for path in sorted(root.glob(f"*{layout.ARCHIVE_SUFFIX}")):
        try:
            view = open_archive(path)
        except (ValueError, FileNotFoundError, KeyError, json.JSONDecodeError):
            continue
        rows = view.committed_rows
        found.append(
            ArchiveSummary(
                run_id=view.run_id,
                name=view.name,
                state=view.state,
                path=path,
                created_unix_s=float(view.attrs.get("created_unix_s", 0.0)),
                slices=rows.get(layout.SLICES_GROUP, 0),
                surfaces={label: rows.get(layout.surface_group(label), 0) for label in view.surface_labels},
            )
        )
    found.sort(key=lambda s: -s.created_unix_s)
    return found
