"""Puncture tracks of a run's bodies, integrated from the shift the slices carry.

Only for a run that declares a moving-puncture shift gauge (``RunSettings.tracks_punctures``;
any other shift, e.g. a Kerr-Schild one, does not follow a puncture and is ignored for
tracking, with one warning when no gauge was declared) and slices carrying shift_x/y/z. A track
starts at the first horizon centroid found in a slice with a shift and is advanced between
consecutive such slices by :func:`~penumbra_server.tracking.tracks.advance_puncture_track`
(d x^i / dt = -beta^i; Campanelli et al., PRL 96, 111101 (2006); Baker et al., PRL 96, 111102
(2006)). The shift is interpolated in space by 4th-order Lagrange interpolation (error O(h^4))
from the finest patch covering the stencil, and in time linearly (two slices: Heun step, global
error O(dt^2) at the slice cadence dt) or quadratically (three slices: third-order Runge-Kutta,
O(dt^3)). A slice without the shift, or a step the data cannot serve, restarts the track at the
next centroid (a new segment; its starting offset from the true puncture is not known, so the
stated uncertainty counts the integration error since the segment began).

Units: G = c = 1, lengths and times in M.
"""

from __future__ import annotations

import math
from typing import Mapping, Sequence

import numpy as np

from penumbra_shim._wire import horizons_pb2 as pb

from ..archive import _layout as layout
from ..numerics.shift_sampling import carries_shift, shift_field
from ..numerics.slices import Slice
from ..tracking.tracks import ShiftSample, Track, TrackError, advance_puncture_track
from ._spec import RunSettings
from ._tracking_convert import Notice, warning_notice
from .surface_state import SurfaceState

__all__ = ["PunctureTracks"]


class PunctureTracks:
    """Advances the puncture tracks kept in the bodies' :class:`SurfaceState` s, slice by slice."""

    def __init__(self, settings: RunSettings, *, interpolation_order: int = 4) -> None:
        self.settings = settings
        self.order = int(interpolation_order)
        #: Whether the run was told once that its shift is ignored for tracking (no gauge declared).
        self.shift_ignored_told = False

    def advance(self, bodies: Sequence[SurfaceState], slice_: Slice, t: float, it: int,
                new_points: Mapping[str, dict]) -> tuple[dict[str, dict], list[Notice]]:
        """Advance each body's track to ``slice_``; returns (label -> puncture row, warnings).

        ``new_points``: label -> horizon row of the bodies found in this slice (a new segment
        starts at that centroid).
        """
        shifted = carries_shift(slice_)
        points: dict[str, dict] = {}
        warnings: list[Notice] = []
        if shifted and not self.settings.tracks_punctures:
            if self.settings.shift_gauge == "unspecified" and not self.shift_ignored_told:
                self.shift_ignored_told = True
                warnings.append(warning_notice(
                    pb.RunWarning.KIND_TRACKING, "",
                    "the slices carry the shift, but the run spec declares no shift gauge: puncture tracks are "
                    "integrated only for a moving-puncture shift (SHIFT_GAUGE_MOVING_PUNCTURE); the shift is "
                    "not used for tracking"))
            shifted = False  # e.g. a Kerr-Schild shift: it does not follow a puncture
        for h in bodies:
            label = h.label
            if not shifted:
                h.shift_samples.clear()
                continue
            anchor = h.puncture.latest_position if h.puncture is not None and h.puncture.count else h.centroid
            if anchor is None:
                continue
            half = 2.0 * h.radius_max if np.isfinite(h.radius_max) else 2.0 * h.mass
            field_ = shift_field(slice_, anchor - half, anchor + half, order=self.order)
            if field_ is None:
                h.shift_samples.clear()
                continue
            sample = ShiftSample(t, field_)
            previous = h.shift_samples[-1].time if h.shift_samples else math.nan
            consecutive = (h.puncture is not None and h.puncture.count and
                           np.isclose(h.puncture.latest_time, previous, rtol=0, atol=1e-9 * max(1.0, abs(previous))))
            h.shift_samples.append(sample)
            if consecutive:
                samples = list(h.shift_samples)
                try:
                    h.puncture, step = advance_puncture_track(h.puncture, samples[-3:] if len(samples) >= 3 else samples[-2:])
                except TrackError as exc:
                    warnings.append(warning_notice(
                        pb.RunWarning.KIND_TRACKING, label,
                        f"puncture track of {label!r} not advanced to t = {t:.6g} M: {exc}; it restarts from the "
                        f"next horizon centroid"))
                    h.puncture = None
                    h.shift_samples.clear()
                    h.shift_samples.append(sample)
                    continue
                h.puncture_order = step.order
                points[label] = {"iteration": it, "time": t, "position": step.position.tolist(),
                                 "source": layout.TRACK_SOURCES["puncture"],
                                 "uncertainty": float(h.puncture.point_uncertainty()[-1]), "order": step.order,
                                 "method": step.method}
            elif label in new_points:
                # A new segment starts at the horizon centroid of this slice.
                start = np.asarray(new_points[label]["position"], float)
                if h.puncture is not None and h.puncture.count and t > h.puncture.latest_time:
                    h.puncture = h.puncture.append(t, start, uncertainty=0.0)
                else:
                    h.puncture = Track(body=label, times=[t], positions=[start], uncertainty=[0.0], source="puncture")
                h.puncture_order = 0
                h.shift_samples.clear()
                h.shift_samples.append(sample)
                points[label] = {"iteration": it, "time": t, "position": start.tolist(),
                                 "source": layout.TRACK_SOURCES["puncture"], "uncertainty": 0.0, "order": 0,
                                 "method": "start"}
            else:
                h.shift_samples.clear()
        return points, warnings
