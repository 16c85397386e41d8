"""The zarr layout of a run archive: group names, array names, dtypes, dimensions, units.

One zarr v3 group per run at ``<archive_root>/<run_id>.zarr``::

    <run_id>.zarr/             root attributes: run_id, name, state, run_spec, units,
                               software_version, committed_rows, surface_labels, ...
        slices/                one row per slice whose fate is final; dimension "slice"
        surfaces/<label>/      one row per attempt on a surface; dimension "sample"

Every array grows along axis 0 and sets ``dimension_names`` so that ``xarray.open_zarr``
opens each group. Rows become visible to readers only when the root attribute
``committed_rows`` counts them: the writer writes rows first and bumps the counter last.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "ARCHIVE_FORMAT_VERSION",
    "ARCHIVE_SUFFIX",
    "METHOD_CODES",
    "Column",
    "SLICE_COLUMNS",
    "SLICES_GROUP",
    "SURFACES_GROUP",
    "SLICE_OUTCOME_PROCESSED",
    "SLICE_OUTCOME_SKIPPED",
    "SLICE_OUTCOME_FAILED",
    "UNITS",
    "surface_columns",
    "surface_group",
    "archive_path",
]

#: Written to the root attribute ``penumbra_archive_version``; bumped on incompatible changes.
ARCHIVE_FORMAT_VERSION = 1
#: Directory suffix of a run's group.
ARCHIVE_SUFFIX = ".zarr"
SLICES_GROUP = "slices"
SURFACES_GROUP = "surfaces"

#: ``slices/outcome`` values.
SLICE_OUTCOME_PROCESSED = 1
SLICE_OUTCOME_SKIPPED = 2
SLICE_OUTCOME_FAILED = 3

#: ``surfaces/<label>/method`` values: the solver that produced the row.
METHOD_CODES: dict[str, int] = {"": 0, "newton": 1, "flow": 2, "newton+flow": 3}

#: Root attribute ``units``: every length, time and mass is in units of the run's mass scale M.
UNITS: dict[str, str] = {
    "length": "M",
    "time": "M",
    "mass": "M",
    "area": "M^2",
    "expansion": "1/M",
    "wall_clock": "s",
    "bytes": "byte",
}

# Rows per chunk along the growing axis: a chunk is rewritten by every commit that touches it,
# so keep it small enough that this stays cheap and large enough that a long run has few files.
_ROWS_PER_CHUNK = 1024


@dataclass(frozen=True)
class Column:
    """One array of a group: name, dtype, trailing dimensions, fill value, unit."""

    name: str
    dtype: str
    trailing: tuple[tuple[str, int], ...] = ()
    unit: str = ""
    description: str = ""

    @property
    def fill_value(self):
        kind = np.dtype(self.dtype).kind
        if kind == "f":
            return float("nan")
        if kind == "b":
            return False
        return -1

    def chunks(self) -> tuple[int, ...]:
        # Rows with trailing dimensions are wider: fewer per chunk keeps chunks of similar size.
        rows = _ROWS_PER_CHUNK if not self.trailing else _ROWS_PER_CHUNK // 4
        return (rows,) + tuple(size for _, size in self.trailing)

    def dimension_names(self, row_dimension: str) -> list[str]:
        return [row_dimension] + [dim for dim, _ in self.trailing]


SLICE_COLUMNS: tuple[Column, ...] = (
    Column("iteration", "int64", description="the evolution's iteration number"),
    Column("time", "float64", unit="M", description="coordinate time of the slice"),
    Column("arrival_unix_s", "float64", unit="s", description="wall clock when the slice was assembled"),
    Column("bytes", "int64", unit="byte", description="field bytes received"),
    Column("outcome", "int8", description="1 processed, 2 skipped by the backlog policy, 3 failed"),
    Column("latency_s", "float64", unit="s", description="arrival to last surface result archived"),
    Column("queue_wait_s", "float64", unit="s", description="arrival to start of processing"),
    Column("surfaces_attempted", "int32"),
    Column("surfaces_found", "int32"),
    Column("superseded_by_iteration", "int64", description="skipped slices: the newer slice queued instead"),
    Column("archived_unix_s", "float64", unit="s", description="wall clock of the commit that wrote the row"),
    Column("event_seq", "int64", description="seq of the slice_processed or slice_skipped event"),
)


def surface_columns(lmax: int) -> tuple[Column, ...]:
    """Columns of ``surfaces/<label>`` for surfaces of degree ``lmax``."""
    xyz = (("xyz", 3),)
    return (
        Column("iteration", "int64", description="the evolution's iteration number"),
        Column("time", "float64", unit="M", description="coordinate time of the slice"),
        Column("status", "int32", description="finder status, 0 converged; -1 no attempt ran"),
        Column("found", "bool"),
        Column("reason", "int8", description="0 found; else SurfaceNotFound.Reason"),
        Column("centre", "float64", xyz, unit="M", description="expansion centre of the surface"),
        Column(
            "coefficients",
            "float64",
            (("harmonic", (lmax + 1) ** 2),),
            unit="M",
            description="real spherical-harmonic coefficients of h, index l*l + l + m",
        ),
        Column("area", "float64", unit="M^2"),
        Column("irreducible_mass", "float64", unit="M", description="sqrt(area / 16 pi)"),
        Column("centroid", "float64", xyz, unit="M", description="area-weighted coordinate centroid"),
        Column("radius_min", "float64", unit="M"),
        Column("radius_mean", "float64", unit="M"),
        Column("radius_max", "float64", unit="M"),
        Column("circumference_xy", "float64", unit="M", description="proper, plane z = centroid z"),
        Column("circumference_xz", "float64", unit="M", description="proper, plane y = centroid y"),
        Column("circumference_yz", "float64", unit="M", description="proper, plane x = centroid x"),
        Column("resolution_indicator", "float64", description="top-degree coefficient fraction"),
        Column("residual_max", "float64", unit="1/M", description="max |Theta| at the nodes"),
        Column("iterations", "int32"),
        Column("method", "int8", description="solver: 0 none, 1 newton, 2 flow, 3 newton then flow (METHOD_CODES)"),
        Column("wall_time_s", "float64", unit="s", description="finder wall time in the worker"),
        Column("latency_s", "float64", unit="s", description="slice arrival to this row archived"),
        Column("archived_unix_s", "float64", unit="s", description="wall clock of the commit that wrote the row"),
        Column("event_seq", "int64", description="seq of the announced surface event"),
    )


def surface_group(label: str) -> str:
    """Path of a surface's group inside the run group, e.g. ``surfaces/A``."""
    return f"{SURFACES_GROUP}/{label}"


def archive_path(archive_root, run_id: str):
    """``<archive_root>/<run_id>.zarr`` as a :class:`pathlib.Path`."""
    from pathlib import Path

    return Path(archive_root) / f"{run_id}{ARCHIVE_SUFFIX}"
