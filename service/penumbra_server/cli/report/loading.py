"""Read a run's archive into plain records: one :class:`ArchivedRun` of numpy columns.

Everything else in the report works on that record, never on zarr. The archive's code tables
(slice outcomes, track sources, forecast models) come from the archive layout
(:mod:`penumbra_server.archive._layout`); this module only gives them the names a report
prints. Also here: small accessors of the record (found rows in time order, track points by
source) that both the numbers and the plots use.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from penumbra_server.archive._layout import (FORECAST_MODELS, SLICE_OUTCOME_FAILED, SLICE_OUTCOME_PROCESSED,
                                             SLICE_OUTCOME_SKIPPED, TRACK_SOURCES)

__all__ = [
    "ArchivedRun",
    "FORECAST_MODEL_NAMES",
    "SLICE_OUTCOME_FAILED",
    "SLICE_OUTCOME_PROCESSED",
    "SLICE_OUTCOME_SKIPPED",
    "TRACK_SOURCE_HORIZON",
    "TRACK_SOURCE_PUNCTURE",
    "found_rows",
    "load_run",
    "track_labels",
    "track_points",
]

#: ``forecasts/<label>/model`` code -> the name a report prints (the layout's "" is "none").
FORECAST_MODEL_NAMES: dict[int, str] = {code: name or "none" for name, code in FORECAST_MODELS.items()}
#: ``tracks/<label>/source`` codes.
TRACK_SOURCE_HORIZON = TRACK_SOURCES["horizon"]
TRACK_SOURCE_PUNCTURE = TRACK_SOURCES["puncture"]


@dataclass(frozen=True, eq=False)
class ArchivedRun:
    """What a report needs from one archive, as plain arrays (a consistent prefix of a live run).

    Not the server's record of a live run: this is what the archive holds, read back.

    Attributes:
        path: the run's zarr group on disk.
        run_id, name, state: from the group attributes.
        body_labels: labels of the bodies in the run spec, in spec order.
        surfaces: label -> column name -> array (rows = attempts, see ARCHIVE layout in the README).
        slices: column name -> array (rows = slices whose fate is final).
        lmax: label -> harmonic degree of the coefficient column.
        tracks: label -> columns of ``tracks/<label>`` (horizon and puncture points, time order).
        forecasts: label -> columns of ``forecasts/<label>`` (one row per forecast issued).
        guidance: {"updates", "bodies", "regions"} -> columns (empty columns if none).
        events: columns of the archive's ``events`` group (tracking and guidance events).
        run_spec: the run spec as archived.
    """

    path: Path
    run_id: str
    name: str
    state: str
    body_labels: tuple[str, ...]
    surfaces: dict[str, dict[str, np.ndarray]]
    slices: dict[str, np.ndarray]
    lmax: dict[str, int]
    tracks: dict[str, dict[str, np.ndarray]] = field(default_factory=dict)
    forecasts: dict[str, dict[str, np.ndarray]] = field(default_factory=dict)
    guidance: dict[str, dict[str, np.ndarray]] = field(default_factory=dict)
    events: dict[str, np.ndarray] = field(default_factory=dict)
    run_spec: dict = field(default_factory=dict)

    @property
    def labels(self) -> tuple[str, ...]:
        """Body labels first (spec order), then any other surface (e.g. the common horizon)."""
        others = sorted(l for l in self.surfaces if l not in self.body_labels)
        return tuple(l for l in self.body_labels if l in self.surfaces) + tuple(others)

    @property
    def merged_labels(self) -> tuple[str, ...]:
        return tuple(l for l in self.labels if l not in self.body_labels)


def _lmax_of(columns: dict[str, np.ndarray]) -> int:
    coefficients = columns.get("coefficients")
    if coefficients is None or coefficients.ndim != 2:
        return -1
    return int(round(math.sqrt(coefficients.shape[1]))) - 1


def load_run(path) -> ArchivedRun:
    """Read an archive (``<archive_root>/<run_id>.zarr``) through the archive reader."""
    from penumbra_server.archive import open_archive

    path = Path(path)
    if not path.exists():
        raise FileNotFoundError(f"archive: no such path {str(path)!r}; expected <archive_root>/<run_id>.zarr")
    view = open_archive(path)
    spec = view.run_spec or {}
    bodies = tuple(str(b["label"]) for b in spec.get("bodies", ()))
    surfaces = {label: {k: np.asarray(v) for k, v in view.surface(label).items()} for label in view.surface_labels}
    slices = {k: np.asarray(v) for k, v in view.slices().items()}
    attrs = dict(view.attrs)

    def plain(columns):
        return {k: np.asarray(v) for k, v in columns.items()}

    return ArchivedRun(
        path=path,
        run_id=str(view.run_id),
        name=str(attrs.get("name", "")),
        state=str(attrs.get("state", "")),
        body_labels=bodies,
        surfaces=surfaces,
        slices=slices,
        lmax={label: _lmax_of(cols) for label, cols in surfaces.items()},
        tracks={label: plain(view.track(label)) for label in view.track_labels},
        forecasts={label: plain(view.forecasts(label)) for label in view.forecast_labels},
        guidance={part: plain(cols) for part, cols in view.guidance().items()},
        events=plain(view.tracking_events()),
        run_spec=dict(spec),
    )


def track_labels(record: ArchivedRun) -> tuple[str, ...]:
    """Labels with a server track: surfaces first (in :attr:`ArchivedRun.labels` order), then others."""
    return tuple(l for l in record.labels if l in record.tracks) + tuple(
        sorted(l for l in record.tracks if l not in record.labels))


def found_rows(cols: dict[str, np.ndarray]) -> np.ndarray:
    """Row indexes of a surface's found attempts, in time order."""
    found = np.asarray(cols.get("found", np.zeros(0, bool)), dtype=bool)
    idx = np.flatnonzero(found)
    return idx[np.argsort(np.asarray(cols["time"])[idx], kind="stable")] if idx.size else idx


def track_points(record: ArchivedRun, label: str, source: int) -> tuple[np.ndarray, np.ndarray]:
    """(times, positions (n, 3)) of one label's track from one source; the surfaces' centroids
    when the archive has no tracking groups (archives written before the tracks existed)."""
    cols = record.tracks.get(label)
    if cols is not None and len(cols.get("time", ())):
        keep = np.asarray(cols["source"], dtype=int) == source
        return np.asarray(cols["time"], float)[keep], np.asarray(cols["position"], float).reshape(-1, 3)[keep]
    if source != TRACK_SOURCE_HORIZON or label not in record.surfaces:
        return np.zeros(0), np.zeros((0, 3))
    rows = found_rows(record.surfaces[label])
    return (np.asarray(record.surfaces[label]["time"], float)[rows],
            np.asarray(record.surfaces[label]["centroid"], float).reshape(-1, 3)[rows])
