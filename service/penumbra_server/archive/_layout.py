"""The zarr layout of a run archive: group names, array names, dtypes, dimensions, units.

One zarr v3 group per run at ``<archive_root>/<run_id>.zarr``::

    <run_id>.zarr/             root attributes: run_id, name, state, run_spec, units,
                               software_version, committed_rows, surface_labels, ...
        slices/                one row per slice whose fate is final; dimension "time"
        surfaces/<label>/      one row per attempt on a surface; dimension "time"
        tracks/<label>/        one row per track point (horizon centroid or puncture); "point"
        forecasts/<label>/     one row per forecast issued; dimensions "forecast", "lead"
        guidance/updates/      one row per refinement guidance; "update"
        guidance/bodies/       one row per body of a guidance; "entry"
        guidance/regions/      one row per merged region per level of a guidance; "region"
        windows/               one row per data window wanted; "window"
        events/                one row per tracking/guidance event, with its wire form; "event"
        client_gaps/           one row per range of slices the client dropped during an outage
                               of its link (a gap without drops: one row, count 0); "range"
        formation/             one row per constant-expansion search of a pair before its
                               common horizon formed, with the formation forecast; "search"
        journal/               commits not yet folded into the arrays (journal.py), not zarr

The tracking groups and ``client_gaps/`` are created by the first fold after a commit wrote to them.

Every array grows along axis 0 and sets ``dimension_names`` so that ``xarray.open_zarr``
opens each group. The time-series groups (slices, surfaces) name their row dimension ``time``,
so their ``time`` column is the dimension coordinate when xarray opens them (archives written
before this used "slice" and "sample"; the reader handles both).

Commits are written behind (writer.py, journal.py): each commit is first a file of
``<run_id>.zarr/journal/`` (no ``zarr.json``: zarr and xarray ignore it); the writer *folds* the
journal into the arrays in bulk, then bumps the root attribute ``committed_rows`` (and
``journal_folded_through``, the last commit folded), then consolidates the metadata, so
``xarray.open_zarr`` opens a group without a warning and sees the rows of the last fold (every
row once the run closed). Rows in the arrays count only when ``committed_rows`` counts them;
the project's reader adds the journal's commits after ``journal_folded_through``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "ARCHIVE_FORMAT_VERSION",
    "fill_value_of",
    "ARCHIVE_SUFFIX",
    "METHOD_CODES",
    "Column",
    "SLICE_COLUMNS",
    "SLICES_GROUP",
    "SURFACES_GROUP",
    "TIME_DIMENSION",
    "SLICE_OUTCOME_PROCESSED",
    "SLICE_OUTCOME_SKIPPED",
    "SLICE_OUTCOME_FAILED",
    "UNITS",
    "surface_columns",
    "DISPLACEMENT_REFERENCE_EXTRA_DEGREE",
    "displacement_reference_rows",
    "surface_group",
    "archive_path",
    "FORECAST_LEADS",
    "TRACK_SOURCES",
    "FORECAST_MODELS",
    "TRACKS_GROUP",
    "FORECASTS_GROUP",
    "GUIDANCE_UPDATES_GROUP",
    "GUIDANCE_BODIES_GROUP",
    "GUIDANCE_REGIONS_GROUP",
    "WINDOWS_GROUP",
    "EVENTS_GROUP",
    "CLIENT_GAPS_GROUP",
    "FORMATION_GROUP",
    "FORMATION_COLUMNS",
    "CLIENT_DROP_REASONS",
    "group_columns",
]

#: Written to the root attribute ``penumbra_archive_version``; bumped on incompatible changes.
ARCHIVE_FORMAT_VERSION = 1
#: Directory suffix of a run's group.
ARCHIVE_SUFFIX = ".zarr"
SLICES_GROUP = "slices"
SURFACES_GROUP = "surfaces"
#: Row dimension of ``slices/`` and ``surfaces/<label>`` (older archives: "slice", "sample").
TIME_DIMENSION = "time"

#: ``slices/outcome`` values.
SLICE_OUTCOME_PROCESSED = 1
SLICE_OUTCOME_SKIPPED = 2
SLICE_OUTCOME_FAILED = 3

#: ``surfaces/<label>/method`` values: the solver that produced the row.
METHOD_CODES: dict[str, int] = {"": 0, "newton": 1, "flow": 2, "newton+flow": 3, "displacement": 4}

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

# Rows per chunk along the growing axis: a chunk is rewritten by every fold that touches it, so
# keep it small enough that this stays cheap and large enough that a long run has few files.
_ROWS_PER_CHUNK = 1024
# Wide rows (harmonic coefficients, a displacement's reference) get fewer rows per chunk, so that
# a chunk holds at most about this many bytes (at least 16 rows).
_CHUNK_BYTES = 128 * 1024


def fill_value_of(dtype: np.dtype):
    """What an absent value reads as: NaN (float), False (bool), -1 (integer), "" (text)."""
    if dtype.kind == "f":
        return float("nan")
    if dtype.kind == "b":
        return False
    if dtype.kind in "iu":
        return -1
    return ""


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
        return fill_value_of(np.dtype(object) if self.dtype == "str" else np.dtype(self.dtype))

    def chunks(self) -> tuple[int, ...]:
        # Rows with trailing dimensions are wider: fewer per chunk keeps chunks of similar size.
        rows = _ROWS_PER_CHUNK if not self.trailing else _ROWS_PER_CHUNK // 4
        trailing = tuple(size for _, size in self.trailing)
        row_bytes = int(np.prod(trailing)) * (8 if self.dtype == "str" else np.dtype(self.dtype).itemsize)
        while rows > 16 and rows * row_bytes > _CHUNK_BYTES:
            rows //= 2
        return (rows,) + trailing

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


#: Multipoles archived per surface, index n = 0 .. MULTIPOLE_COUNT - 1 (archives written before
#: n = 8 hold 5).
MULTIPOLE_COUNT = 9


#: Degree of a displacement's reference above the surface's (numerics.displaced.reference_from_star
#: makes it 2 higher so that h times the radial unit vector is exact); the reference columns hold
#: references up to this much higher.
DISPLACEMENT_REFERENCE_EXTRA_DEGREE = 2


def displacement_reference_rows(lmax: int) -> int:
    """Rows of the reference columns of a surface group of degree ``lmax``."""
    return (lmax + DISPLACEMENT_REFERENCE_EXTRA_DEGREE + 1) ** 2


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
        Column("centroid_error", "float64", unit="M", description="error estimate of centroid (length of the displacement)"),
        # Coordinate extent only (for refinement and plots): shape figures that mean something
        # are the spin-axis circumferences below, not cuts with the coordinate planes.
        Column("coordinate_radius", "float64", (("extent", 3),), unit="M",
               description="least, mean and largest coordinate distance from the expansion centre"),
        Column("resolution_indicator", "float64", description="top-degree coefficient fraction"),
        Column("residual_max", "float64", unit="1/M", description="max |Theta| at the nodes"),
        Column("residual_max_between_nodes", "float64", unit="1/M",
               description="max |Theta| on a finer point set between the nodes (the honest residual)"),
        Column("angular_momentum", "float64", xyz, unit="M^2",
               description="J_i from the coordinate rotations about the centroid (spin estimate)"),
        Column("christodoulou_mass", "float64", unit="M", description="sqrt(M_irr^2 + J^2 / (4 M_irr^2))"),
        Column("akv_angular_momentum", "float64", unit="M^2",
               description="J >= 0 from the approximate Killing vector, about spin_direction"),
        Column("spin_direction", "float64", xyz, description="unit coordinate vector of the AKV spin"),
        Column("dimensionless_spin", "float64", description="chi = J / M_chr^2 (AKV J)"),
        Column("akv_christodoulou_mass", "float64", unit="M", description="Christodoulou mass with the AKV J"),
        Column("killing_quality", "float64", description="lowest AKV eigenvalue lambda R^2 (0: exact Killing field)"),
        Column("spin_equatorial_circumference", "float64", unit="M",
               description="proper, plane through the centroid perpendicular to the spin axis"),
        Column("spin_polar_circumference", "float64", unit="M",
               description="proper, mean of two perpendicular planes containing the spin axis"),
        Column("spin_circumference_ratio", "float64", description="polar / equatorial"),
        Column("circumference_spin", "float64",
               description="chi from spin_circumference_ratio, Kerr's relation inverted (Brandt & Seidel 1995)"),
        Column("mass_multipoles", "float64", (("multipole", MULTIPOLE_COUNT),),
               description=f"M_n / M^(n+1), index n = 0..{MULTIPOLE_COUNT - 1}"),
        Column("spin_multipoles", "float64", (("multipole", MULTIPOLE_COUNT),),
               description=f"J_n / M^(n+1), index n = 0..{MULTIPOLE_COUNT - 1}"),
        Column("area_error", "float64", unit="M^2", description="error estimate of area (numerics/error_bars.py)"),
        Column("irreducible_mass_error", "float64", unit="M", description="error estimate of irreducible_mass"),
        Column("akv_christodoulou_mass_error", "float64", unit="M",
               description="error estimate of akv_christodoulou_mass"),
        Column("akv_angular_momentum_error", "float64", unit="M^2", description="error estimate of akv_angular_momentum"),
        Column("dimensionless_spin_error", "float64", description="error estimate of dimensionless_spin"),
        Column("stability_eigenvalue", "float64", unit="1/M^2",
               description="principal eigenvalue of the MOTS stability operator (l = n + s, k = (n - s) / 2)"),
        Column("stability_eigenvalue_error", "float64", unit="1/M^2",
               description="change of stability_eigenvalue when psi's harmonic degree drops by 2"),
        Column("spin_direction_error", "float64", unit="rad",
               description="error estimate of spin_direction, an angle (pi: J indistinguishable from 0)"),
        Column("spin_equatorial_circumference_error", "float64", unit="M",
               description="error estimate of spin_equatorial_circumference"),
        Column("spin_polar_circumference_error", "float64", unit="M",
               description="error estimate of spin_polar_circumference"),
        Column("mass_multipoles_error", "float64", (("multipole", MULTIPOLE_COUNT),),
               description="error estimate of each mass multipole"),
        Column("spin_multipoles_error", "float64", (("multipole", MULTIPOLE_COUNT),),
               description="error estimate of each spin multipole"),
        # The surface itself in the normal-displacement representation (numerics/displaced.py),
        # for surfaces followed in it (the inner common MOTS): the star-shaped coefficients above
        # are only a fit, NaN once it folds. Stored in the first rows of each column, NaN after
        # (a degree below the column's); degree -1 and NaN everywhere for star-shaped surfaces.
        Column("displacement_lmax", "int32", description="degree of displacement (-1: not in this representation)"),
        Column("displacement", "float64", (("harmonic", (lmax + 1) ** 2),), unit="M",
               description="real spherical-harmonic coefficients of the normal displacement h from the reference, "
                           "index l*l + l + m (x = x_ref + h n_ref)"),
        Column("displacement_reference_lmax", "int32", description="degree of the reference surface's expansions"),
        Column("displacement_reference_position", "float64",
               (("reference_harmonic", displacement_reference_rows(lmax)), ("xyz", 3)), unit="M",
               description="coefficients of the reference's Cartesian coordinates x_ref, index l*l + l + m"),
        Column("displacement_reference_direction", "float64",
               (("reference_harmonic", displacement_reference_rows(lmax)), ("xyz", 3)),
               description="coefficients of the reference's unit displacement direction n_ref, index l*l + l + m"),
        Column("seed_centre", "float64", xyz, unit="M",
               description="forecast position the planner seeded the search at (NaN: no forecast seed)"),
        Column("seed_uncertainty", "float64", unit="M",
               description="the forecast's expected error at that position (inf: unknown)"),
        Column("seed_model", "int8", description="0 none, 1 static, 2 polynomial, 3 orbit (FORECAST_MODELS)"),
        Column("iterations", "int32"),
        Column("method", "int8", description="solver: 0 none, 1 newton, 2 flow, 3 newton then flow, 4 newton in the displacement representation (METHOD_CODES)"),
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


# -- tracking, guidance and windows --------------------------------------------------------------

TRACKS_GROUP = "tracks"
FORECASTS_GROUP = "forecasts"
GUIDANCE_UPDATES_GROUP = "guidance/updates"
GUIDANCE_BODIES_GROUP = "guidance/bodies"
GUIDANCE_REGIONS_GROUP = "guidance/regions"
WINDOWS_GROUP = "windows"
EVENTS_GROUP = "events"

#: Forecast times per forecast row: the slice's time to one regrid interval later.
FORECAST_LEADS = 9
#: ``tracks/<label>/source`` values.
TRACK_SOURCES: dict[str, int] = {"horizon": 1, "puncture": 2}
#: ``forecasts/<label>/model`` and ``surfaces/<label>/seed_model`` values.
FORECAST_MODELS: dict[str, int] = {"": 0, "static": 1, "polynomial": 2, "orbit": 3}

_XYZ = (("xyz", 3),)

TRACK_COLUMNS: tuple[Column, ...] = (
    Column("iteration", "int64", description="the evolution's iteration number"),
    Column("time", "float64", unit="M", description="coordinate time of the slice"),
    Column("position", "float64", _XYZ, unit="M", description="horizon centroid or puncture position"),
    Column("source", "int8", description="1 horizon centroid, 2 puncture integrated from the shift (TRACK_SOURCES)"),
    Column("uncertainty", "float64", unit="M",
           description="0 for centroids; punctures: summed step error estimates since the track began"),
    Column("order", "int8", description="punctures: global error order of the step (2 or 3); 0 else"),
    Column("event_seq", "int64", description="seq of the track_updated event"),
)

FORECAST_COLUMNS: tuple[Column, ...] = (
    Column("iteration", "int64", description="iteration of the slice after which the forecast was made"),
    Column("time", "float64", unit="M", description="coordinate time of that slice"),
    Column("model", "int8", description="1 static, 2 polynomial, 3 orbit (FORECAST_MODELS)"),
    Column("fit_from", "float64", unit="M", description="first sample time the fit used"),
    Column("fit_until", "float64", unit="M", description="last sample time the fit used"),
    Column("lead_time", "float64", (("lead", FORECAST_LEADS),), unit="M", description="forecast times"),
    Column("position", "float64", (("lead", FORECAST_LEADS), ("xyz", 3)), unit="M",
           description="forecast positions"),
    Column("uncertainty", "float64", (("lead", FORECAST_LEADS),), unit="M",
           description="expected position error (inf: unknown)"),
    Column("reason", "str", description="why this model"),
    Column("event_seq", "int64", description="seq of the track_updated event carrying the forecast"),
)

GUIDANCE_UPDATE_COLUMNS: tuple[Column, ...] = (
    Column("iteration", "int64", description="iteration of the slice the guidance was made from"),
    Column("time", "float64", unit="M"),
    Column("valid_from", "float64", unit="M"),
    Column("valid_until", "float64", unit="M"),
    Column("post_merger", "bool", description="a single region around the remnant"),
    Column("nesting_depth", "int32", description="nesting depth of the policy (its finest level)"),
    Column("finest_spacing", "float64", unit="M", description="spacing of the finest level"),
    Column("reasons", "str", description="JSON object: notes on the whole guidance"),
    Column("event_seq", "int64", description="seq of the refinement_guidance event"),
)

GUIDANCE_BODY_COLUMNS: tuple[Column, ...] = (
    Column("iteration", "int64"),
    Column("time", "float64", unit="M"),
    Column("label", "str", description="body label ('common' for the remnant)"),
    Column("centre", "float64", _XYZ, unit="M"),
    Column("finest_level", "int32"),
    Column("finest_radius", "float64", unit="M"),
    Column("finest_spacing", "float64", unit="M"),
    Column("required_spacing", "float64", unit="M", description="smallest diameter / points across"),
    Column("finest_lower", "float64", _XYZ, unit="M", description="box form of the finest level"),
    Column("finest_upper", "float64", _XYZ, unit="M"),
    Column("horizon_max_radius", "float64", unit="M"),
    Column("horizon_min_diameter", "float64", unit="M"),
    Column("margin_horizon", "float64", unit="M"),
    Column("margin_motion", "float64", unit="M"),
    Column("margin_uncertainty", "float64", unit="M"),
    Column("margin_guard", "float64", unit="M"),
    Column("reasons", "str", description="JSON object: why each number has its value"),
    Column("event_seq", "int64", description="seq of the refinement_guidance event"),
)

GUIDANCE_REGION_COLUMNS: tuple[Column, ...] = (
    Column("iteration", "int64"),
    Column("time", "float64", unit="M"),
    Column("level", "int32", description="1 coarsest .. nesting_depth finest"),
    Column("spacing", "float64", unit="M"),
    Column("bodies", "str", description="labels covered, joined by '+'"),
    Column("centre", "float64", _XYZ, unit="M", description="sphere form"),
    Column("radius", "float64", unit="M", description="sphere form"),
    Column("lower", "float64", _XYZ, unit="M", description="box form"),
    Column("upper", "float64", _XYZ, unit="M", description="box form"),
    Column("reason", "str"),
    Column("event_seq", "int64", description="seq of the refinement_guidance event"),
)

WINDOW_COLUMNS: tuple[Column, ...] = (
    Column("iteration", "int64", description="iteration of the slice the windows were made from"),
    Column("time", "float64", unit="M"),
    Column("valid_from", "float64", unit="M"),
    Column("valid_until", "float64", unit="M"),
    Column("name", "str", description="surface label(s) served, joined by '+'"),
    Column("lower", "float64", _XYZ, unit="M"),
    Column("upper", "float64", _XYZ, unit="M"),
    Column("growth", "int32", description="times grown after a slice lacked data"),
    Column("extra_nodes", "int32", description="stencil nodes to keep around each cut, per patch"),
    Column("reason", "str"),
    Column("event_seq", "int64", description="seq of the data_windows_wanted event"),
)

EVENT_COLUMNS: tuple[Column, ...] = (
    Column("seq", "int64", description="sequence number of the event"),
    Column("kind", "str", description="track_updated, common_horizon_formed, refinement_guidance, "
                                      "data_windows_wanted, warning, slice_rejected or client_gap_recorded"),
    Column("iteration", "int64"),
    Column("time", "float64", unit="M"),
    Column("label", "str", description="surface or body concerned ('' for guidance and windows)"),
    Column("message", "str", description="warnings: the text; else a one-line summary"),
    Column("wire", "str", description="base64 of the serialized penumbra.v1.RunEvent (replayed after a restart)"),
    Column("archived_unix_s", "float64", unit="s"),
)

# -- outages of the client's link --------------------------------------------------------------

CLIENT_GAPS_GROUP = "client_gaps"
#: ``client_gaps/reason`` values (the wire's ClientDropReason numbers); 0: a gap without drops.
CLIENT_DROP_REASONS: dict[str, int] = {"": 0, "link_down": 1, "queue_full": 2, "retry_time_exceeded": 3,
                                       "handle_closed": 4, "server_busy": 5}

CLIENT_GAP_COLUMNS: tuple[Column, ...] = (
    Column("gap_index", "int64", description="index of the gap in the run's gaps, from 0 (rows of one gap share it)"),
    Column("gap_id", "str", description="the client's token of the gap ('' if none)"),
    Column("iteration_first", "int64", description="iteration of the first dropped slice of the range"),
    Column("iteration_last", "int64", description="iteration of the last dropped slice of the range"),
    Column("count", "int64", description="slices dropped in the range; 0 for a gap without drops"),
    Column("reason", "int8", description="1 link down, 2 queue full, 3 retry time exceeded, 4 handle closed "
                                         "(CLIENT_DROP_REASONS); 0 for a gap without drops"),
    Column("time_first", "float64", unit="M", description="coordinate time of the first dropped slice"),
    Column("time_last", "float64", unit="M", description="coordinate time of the last dropped slice"),
    Column("start_unix_s", "float64", unit="s", description="client wall clock when the link went down"),
    Column("end_unix_s", "float64", unit="s", description="client wall clock when the link came back"),
    Column("cause", "str", description="the last error the client saw during the outage"),
    Column("archived_unix_s", "float64", unit="s", description="server wall clock of the commit"),
    Column("event_seq", "int64", description="seq of the client_gap_recorded event"),
)

# -- when the common horizon forms ---------------------------------------------------------------

FORMATION_GROUP = "formation"

FORMATION_COLUMNS: tuple[Column, ...] = (
    Column("iteration", "int64", description="iteration of the slice searched"),
    Column("time", "float64", unit="M", description="coordinate time of that slice"),
    Column("c_min_found", "bool", description="the smallest enclosing constant expansion was found"),
    Column("c_min", "float64", unit="1/M", description="smallest expansion of the enclosing constant-expansion "
                                                      "surfaces (NaN: not found)"),
    Column("c_min_error", "float64", unit="1/M", description="its uncertainty"),
    Column("mean_radius", "float64", unit="M", description="mean coordinate radius of the c_min surface"),
    Column("centre", "float64", (("xyz", 3),), unit="M", description="centre the surfaces are expanded about"),
    Column("forecast_available", "bool", description="a formation time could be forecast"),
    Column("formation_time", "float64", unit="M", description="forecast time c_min reaches zero (NaN: none)"),
    Column("formation_time_uncertainty", "float64", unit="M", description="its expected error"),
    Column("based_on", "int32", description="c_min values the forecast used"),
    Column("message", "str", description="the search's outcome and the forecast's fit"),
    Column("wall_time_s", "float64", unit="s", description="worker seconds of the search"),
    Column("event_seq", "int64", description="seq of the formation_forecast event"),
)

_FIXED_GROUPS: dict[str, tuple[tuple[Column, ...], str]] = {
    FORMATION_GROUP: (FORMATION_COLUMNS, "search"),
    GUIDANCE_UPDATES_GROUP: (GUIDANCE_UPDATE_COLUMNS, "update"),
    GUIDANCE_BODIES_GROUP: (GUIDANCE_BODY_COLUMNS, "entry"),
    GUIDANCE_REGIONS_GROUP: (GUIDANCE_REGION_COLUMNS, "region"),
    WINDOWS_GROUP: (WINDOW_COLUMNS, "window"),
    EVENTS_GROUP: (EVENT_COLUMNS, "event"),
    CLIENT_GAPS_GROUP: (CLIENT_GAP_COLUMNS, "range"),
}


def group_columns(group_path: str) -> tuple[tuple[Column, ...], str]:
    """(columns, row dimension) of a tracking group path, e.g. ``tracks/A``, ``windows`` or
    ``client_gaps``.

    Raises KeyError for a path that is not a tracking group.
    """
    if group_path in _FIXED_GROUPS:
        return _FIXED_GROUPS[group_path]
    head, _, label = group_path.partition("/")
    if label and "/" not in label:
        if head == TRACKS_GROUP:
            return TRACK_COLUMNS, "point"
        if head == FORECASTS_GROUP:
            return FORECAST_COLUMNS, "forecast"
    raise KeyError(f"group path: {group_path!r} is not a tracking group of the archive layout")
