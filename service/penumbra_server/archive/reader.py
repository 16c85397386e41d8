"""Reading run archives: a consistent prefix of a live or finished run.

A view reads the root attributes once and trusts only their ``committed_rows``: rows beyond
the counts may be half written. zarr readers keep the shapes they opened with, so call
:func:`open_archive` again to see rows committed since.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import zarr

from . import _layout as layout

__all__ = ["ArchiveView", "ArchiveSummary", "open_archive", "list_archives"]


def _open_root(path: Path, *, attempts: int = 5) -> zarr.Group:
    # zarr writes metadata files atomically (temp file + rename), so a reader never sees a torn
    # file; a retry covers the rare case of a directory listed before its metadata exists.
    for attempt in range(attempts):
        try:
            return zarr.open_group(str(path), mode="r", zarr_format=3)
        except (FileNotFoundError, json.JSONDecodeError, KeyError):
            if attempt == attempts - 1:
                raise
            time.sleep(0.05)
    raise AssertionError("unreachable")


class ArchiveView:
    """A snapshot of one run archive: attributes plus committed rows of every array.

    Attributes:
        path: the run group's directory.
        attrs: root attributes (dict), read once when the view was made.
        committed_rows: group path -> rows visible through this view.
    """

    def __init__(self, path: Path, group: zarr.Group) -> None:
        self.path = path
        self._group = group
        self.attrs: dict = dict(group.attrs)
        if self.attrs.get("penumbra_archive_version") != layout.ARCHIVE_FORMAT_VERSION:
            raise ValueError(
                f"{path}: not a Penumbra run archive (penumbra_archive_version="
                f"{self.attrs.get('penumbra_archive_version')!r}, expected {layout.ARCHIVE_FORMAT_VERSION})"
            )
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

    def _columns(self, group_path: str) -> dict[str, np.ndarray]:
        rows = self.committed_rows[group_path]
        group = self._group[group_path]
        return {name: np.asarray(arr[:rows]) for name, arr in sorted(group.arrays())}

    def slices(self) -> dict[str, np.ndarray]:
        """Columns of ``slices/`` (see the layout), committed rows only."""
        return self._columns(layout.SLICES_GROUP)

    def surface(self, label: str) -> dict[str, np.ndarray]:
        """Columns of ``surfaces/<label>``, committed rows only."""
        group_path = layout.surface_group(label)
        if group_path not in self.committed_rows:
            raise KeyError(f"label: no surface {label!r} in {self.path}; it has {', '.join(self.surface_labels)}")
        return self._columns(group_path)

    def _dataset(self, group_path: str, row_dimension: str):
        import xarray as xr  # optional: only the report and tests need it

        group = self._group[group_path]
        rows = self.committed_rows[group_path]
        variables = {}
        for name, arr in sorted(group.arrays()):
            dims = tuple(arr.metadata.dimension_names or ())
            variables[name] = xr.Variable(dims, np.asarray(arr[:rows]), attrs=dict(arr.attrs))
        return xr.Dataset(variables, attrs={"run_id": self.run_id, "group": group_path, "row_dimension": row_dimension})

    def surface_dataset(self, label: str):
        """``surfaces/<label>`` as an :class:`xarray.Dataset` over dimension ``sample``."""
        self.surface(label)  # validates the label
        return self._dataset(layout.surface_group(label), "sample")

    def slices_dataset(self):
        """``slices/`` as an :class:`xarray.Dataset` over dimension ``slice``."""
        return self._dataset(layout.SLICES_GROUP, "slice")


def open_archive(path_or_root: str | Path, run_id: str | None = None) -> ArchiveView:
    """Open a run archive by its path, or by ``(archive_root, run_id)``."""
    path = Path(path_or_root)
    if run_id is not None:
        path = layout.archive_path(path, run_id)
    if not path.exists():
        raise FileNotFoundError(f"{path}: no run archive there")
    return ArchiveView(path, _open_root(path))


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
