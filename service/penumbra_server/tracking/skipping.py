"""How far a body may be from its forecast when slices were skipped.

A forecast's own uncertainty is estimated from the track's recent samples; when the slices the
server sees are far apart (the client sends only every few slices, or an overloaded server skips
queued ones), the time since the body was last found exceeds the track's usual spacing and that
estimate knows nothing of the extra gap. Here the uncertainty grows with the gap instead:

* a track of one point has no speed: the speed of light times the time since the find (an upper
  bound in any gauge where coordinate speeds stay below light, as in common moving-puncture
  gauges);
* otherwise the larger of the forecast's uncertainty and :data:`SPEED_SAFETY` times the body's
  last speed times the elapsed time.

Slices count as skipped when the gap is more than :data:`SKIP_RATIO` usual spacings, or when the
body moved more than its own size since the last find (sparse slices: a forecast from a few
far-apart samples is then no better than that bound). The search for such a body, or one that
was missed, looks for it within
:func:`relocation_radius` of the forecast (data windows and the search region grow with it);
each miss widens it by :data:`~penumbra_server.tracking.data_windows.GROWTH_FACTOR`.

Pure functions; units: G = c = 1, lengths and times in M, speeds in M per M.
"""

from __future__ import annotations

import numpy as np

from .data_windows import BOX_FACTOR, GROWTH_FACTOR, MAX_GROWTH
from .motion import SPEED_SAFETY, UNKNOWN_SPEED

__all__ = ["SKIP_RATIO", "usual_spacing", "is_skip", "moves_far", "grown_uncertainty", "relocation_radius"]

#: A gap longer than this many usual spacings counts as skipped slices.
SKIP_RATIO = 1.5


def usual_spacing(times) -> float:
    """Median spacing of a track's sample times (M); NaN with fewer than two samples."""
    t = np.asarray(times, float)
    if t.size < 2:
        return float("nan")
    return float(np.median(np.diff(t)))


def is_skip(elapsed: float, spacing: float) -> bool:
    """Whether ``elapsed`` (M since the last find) is a skip: longer than :data:`SKIP_RATIO`
    usual spacings, or any positive gap after a single find (no spacing known yet)."""
    if not elapsed > 0:
        return False
    if not np.isfinite(spacing) or spacing <= 0:
        return True
    return elapsed > SKIP_RATIO * spacing


def grown_uncertainty(forecast_uncertainty: float, *, speed: float, samples: int, elapsed: float) -> float:
    """Expected position error (M) of a forecast ``elapsed`` M after the last find (module docstring).

    ``speed``: the body's last coordinate speed, M per M (ignored with ``samples`` < 2).
    """
    elapsed = max(0.0, float(elapsed))
    if samples < 2:
        return UNKNOWN_SPEED * elapsed
    drift = SPEED_SAFETY * max(0.0, float(speed)) * elapsed
    u = float(forecast_uncertainty)
    return max(u, drift) if np.isfinite(u) else max(drift, UNKNOWN_SPEED * elapsed)


def moves_far(speed: float, elapsed: float, radius_max: float) -> bool:
    """Whether a body at coordinate ``speed`` moved more than its own largest radius in
    ``elapsed`` M: sparse slices, where a forecast from a few far-apart samples is no better
    than the motion bound."""
    return float(speed) * max(0.0, float(elapsed)) > float(radius_max)


def relocation_radius(radius_max: float, uncertainty: float, *, misses: int, cap: float) -> float:
    """Radius (M) about the forecast within which a skipped or missed body is looked for:
    (BOX_FACTOR r_max + uncertainty) widened by GROWTH_FACTOR per miss (at most MAX_GROWTH), at most ``cap``."""
    widen = GROWTH_FACTOR ** min(max(0, int(misses)), MAX_GROWTH)
    u = float(uncertainty) if np.isfinite(uncertainty) else cap
    return float(min(cap, (BOX_FACTOR * radius_max + u) * widen))
