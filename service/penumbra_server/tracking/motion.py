"""How far the bodies can move after the data windows expire: a speed bound and a growth cap.

Units: geometric (G = c = 1), lengths and times in the run's mass scale M.

The server sends these with its data windows (DataWindowsWanted.speed_bound, growth_cap_m). A
shim holding windows whose validity ended at ``valid_until`` grows every window by
``min(speed_bound * (t - valid_until), growth_cap)`` for a slice at time ``t`` instead of sending
it whole (penumbra_shim.cropping.grow_expired_windows), so a server that lags behind the
evolution still receives cropped slices.

* Speed bound: per body, the largest coordinate speed along the forecast path plus the largest
  growth rate of the forecast's stated uncertainty (the true position can leave the forecast
  path no faster than that), times :data:`SPEED_SAFETY` (an inspiral speeds up past the
  forecast interval). The uncertainty of a fit to few samples can grow faster than any body
  moves; the truth cannot, so the uncertainty's part never lifts a body's bound above the speed
  of light or :data:`SPEED_SAFETY` times its forecast speed, whichever is larger. A body with
  no usable forecast (one sample, infinite uncertainty, or none) counts at :data:`UNKNOWN_SPEED`. The result is at least :data:`MIN_SPEED_BOUND`: on the wire 0
  means "not stated" (an older server), and the shim then sends expired slices whole.
* Growth cap (a bound pair only): the bodies of an inspiral stay inside the disc their orbit has
  swept about the pair's centre of mass, so no body ends up further than that disc's diameter
  from any point of its window. The disc's radius is the largest distance of either body from
  the centre over its track and forecast path, times :data:`CAP_SAFETY`; the largest finite
  forecast uncertainty is added. This assumes the separation does not grow beyond what the
  track has shown (quasi-circular inspirals; a strongly eccentric orbit caught near pericentre
  would need the track of a full orbit first). 0 means no cap.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .forecast import Forecast

__all__ = [
    "MotionBound",
    "MotionError",
    "forecast_speed_bound",
    "orbit_growth_cap",
    "SPEED_SAFETY",
    "UNKNOWN_SPEED",
    "LIGHT_SPEED",
    "MIN_SPEED_BOUND",
    "CAP_SAFETY",
]

#: Factor on the forecast's speed plus uncertainty growth (an inspiral accelerates).
SPEED_SAFETY = 1.5
#: The speed of light, M per M: the speed assumed for a body without a usable forecast and the
#: most the forecast's uncertainty growth may add (common practice as a bound; puncture
#: coordinate speeds stay well below it in the usual gauges).
LIGHT_SPEED = 1.0
UNKNOWN_SPEED = LIGHT_SPEED
#: Smallest stated bound, M per M (0 on the wire means "not stated").
MIN_SPEED_BOUND = 0.01
#: Factor on the largest distance of a body from the pair's centre seen so far.
CAP_SAFETY = 1.25


class MotionError(ValueError):
    """Bad input to a motion bound. The message names the field at fault."""


@dataclass(frozen=True)
class MotionBound:
    """What the server states about the bodies' motion with its windows.

    Attributes:
        speed_bound: coordinate speed bound, M per M (> 0).
        growth_cap: largest growth ever needed, M (0: no cap).
        reason: how the figures were reached.
    """

    speed_bound: float
    growth_cap: float
    reason: str


def forecast_speed_bound(forecast: Forecast | None, *, safety: float = SPEED_SAFETY,
                         unknown_speed: float = UNKNOWN_SPEED) -> float:
    """Coordinate speed bound of the forecast's bodies, M per M (module docstring).

    Args:
        forecast: positions (n_bodies, k, 3) and uncertainty (n_bodies, k) at times (k,);
            None counts as one body without a forecast.
        safety: factor on speed plus uncertainty growth (>= 1).
        unknown_speed: speed of a body without a usable forecast (> 0).

    Returns:
        The largest bound over the bodies, at least :data:`MIN_SPEED_BOUND`.
    """
    if not (np.isfinite(safety) and safety >= 1):
        raise MotionError(f"safety: expected a number >= 1, got {safety!r}")
    if not (np.isfinite(unknown_speed) and unknown_speed > 0):
        raise MotionError(f"unknown_speed: expected a positive number, got {unknown_speed!r}")
    if forecast is None or not forecast.bodies:
        return max(MIN_SPEED_BOUND, float(unknown_speed))
    times = np.asarray(forecast.times, float)
    dt = np.diff(times)
    best = 0.0
    for index in range(len(forecast.bodies)):
        unc = np.asarray(forecast.uncertainty[index], float)
        if times.size < 2 or np.any(dt <= 0) or not np.all(np.isfinite(unc)):
            best = max(best, float(unknown_speed))
            continue
        step = np.linalg.norm(np.diff(forecast.positions[index], axis=0), axis=1)
        speed = float(np.max(step / dt))
        spread = float(max(0.0, np.max(np.diff(unc) / dt)))
        best = max(best, min(safety * (speed + spread), max(LIGHT_SPEED, safety * speed)))
    return max(MIN_SPEED_BOUND, best)


def orbit_growth_cap(paths: Sequence, masses: Sequence[float], *, uncertainty: float = 0.0,
                     safety: float = CAP_SAFETY) -> float:
    """Growth cap for a bound pair, M (module docstring).

    Args:
        paths: per body an (n_i, 3) array of its positions (track points and forecast path),
            units of M; the last row of each gives the centre of mass.
        masses: the two masses (> 0), weighting that centre of mass.
        uncertainty: the largest finite forecast uncertainty, M (>= 0).
        safety: factor on the largest distance from the centre (>= 1).

    Returns:
        2 * safety * (largest distance of a body from the centre) + uncertainty, M.
    """
    if len(paths) != 2 or len(masses) != 2:
        raise MotionError(f"paths, masses: expected two of each, got {len(paths)} and {len(masses)}")
    pts = [np.atleast_2d(np.asarray(p, float)) for p in paths]
    for index, p in enumerate(pts):
        if p.ndim != 2 or p.shape[1] != 3 or p.shape[0] == 0 or not np.all(np.isfinite(p)):
            raise MotionError(f"paths[{index}]: expected a non-empty (n, 3) array of finite positions")
    m = np.asarray(masses, float)
    if not (np.all(np.isfinite(m)) and np.all(m > 0)):
        raise MotionError(f"masses: expected two positive numbers, got {list(masses)}")
    if not (np.isfinite(uncertainty) and uncertainty >= 0):
        raise MotionError(f"uncertainty: expected a finite number >= 0, got {uncertainty!r}")
    if not (np.isfinite(safety) and safety >= 1):
        raise MotionError(f"safety: expected a number >= 1, got {safety!r}")
    centre = (m[0] * pts[0][-1] + m[1] * pts[1][-1]) / float(m.sum())
    reach = max(float(np.max(np.linalg.norm(p - centre, axis=1))) for p in pts)
    return 2.0 * safety * reach + float(uncertainty)
