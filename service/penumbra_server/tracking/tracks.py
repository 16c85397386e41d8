"""Tracks of bodies over time, and puncture positions integrated from the shift.

Units: geometric (G = c = 1); times and lengths in the run's mass scale M, the shift
beta^i is dimensionless (coordinate length per coordinate time).

A moving puncture moves with minus the shift at its position, d x^i / dt = -beta^i(x)
(Campanelli, Lousto, Marronetti & Zlochower, PRL 96, 111101 (2006); Baker, Centrella, Choi,
Koppitz & van Meter, PRL 96, 111102 (2006)). The server holds the shift only at slice times,
as callables ``points (N, 3) -> shift (N, 3)`` built by interpolating the shift on the grid,
so the integrator interpolates the shift in time between those slices:

* two slices (t0, t1): the shift is linear in time between them and the step is Heun's
  predictor-corrector (explicit trapezoidal rule): x* = x0 - dt beta(t0, x0),
  x1 = x0 - dt/2 [beta(t0, x0) + beta(t1, x*)]. Local error O(dt^3), global error O(dt^2)
  at a fixed slice cadence dt (both the time interpolation and the step are second order).
* three slices (t_prev, t0, t1): the shift is the quadratic through the three slices and the
  step is Kutta's third-order Runge-Kutta. The quadratic's error is O(dt^3), so the
  local error is O(dt^4) and the global error O(dt^3).

Spatial interpolation of the shift is the caller's (the callables'); its error adds to these.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from ._arrays import frozen_float_array

__all__ = [
    "TrackError",
    "Track",
    "ShiftField",
    "ShiftSample",
    "PunctureStep",
    "PUNCTURE_METHODS",
    "integrate_puncture",
    "advance_puncture_track",
]

#: A shift field at one slice time: points (N, 3) -> beta^i at those points (N, 3).
ShiftField = Callable[[np.ndarray], np.ndarray]


class TrackError(ValueError):
    """Bad input to a track function. The message names the field at fault."""


@dataclass(frozen=True, eq=False)
class Track:
    """Positions of one body over time (immutable: :meth:`append` returns a new track).

    Attributes:
        body: name of the body (e.g. "A", "B", "remnant").
        times: (n,) strictly increasing coordinate times, units of M.
        positions: (n, 3) coordinate positions, units of M.
        uncertainty: (n,) non-negative position uncertainty per point (units of M), or None
            when unknown.
        source: what the points are: "centroid" (horizon centroids), "puncture" (integrated
            from the shift) or another label of the caller's.
    """

    body: str
    times: np.ndarray
    positions: np.ndarray
    uncertainty: np.ndarray | None = None
    source: str = "centroid"

    def __post_init__(self) -> None:
        times = np.asarray(self.times, dtype=float)
        positions = np.asarray(self.positions, dtype=float)
        if times.ndim != 1:
            raise TrackError(f"times: expected a 1-D array, got shape {times.shape}")
        if positions.shape != (times.size, 3):
            raise TrackError(
                f"positions: expected shape ({times.size}, 3) to match times, got {positions.shape}"
            )
        if not (np.all(np.isfinite(times)) and np.all(np.isfinite(positions))):
            raise TrackError("times/positions: expected finite numbers")
        if times.size > 1 and np.any(np.diff(times) <= 0):
            raise TrackError("times: expected strictly increasing values")
        object.__setattr__(self, "times", frozen_float_array(times))
        object.__setattr__(self, "positions", frozen_float_array(positions))
        if self.uncertainty is not None:
            unc = np.asarray(self.uncertainty, dtype=float)
            if unc.shape != (times.size,):
                raise TrackError(f"uncertainty: expected shape ({times.size},), got {unc.shape}")
            if not np.all(np.isfinite(unc)) or np.any(unc < 0):
                raise TrackError("uncertainty: expected finite non-negative values")
            object.__setattr__(self, "uncertainty", frozen_float_array(unc))
        object.__setattr__(self, "body", str(self.body))
        object.__setattr__(self, "source", str(self.source))

    @classmethod
    def empty(cls, body: str, *, source: str = "centroid") -> "Track":
        """A track with no points yet."""
        return cls(body=body, times=np.zeros(0), positions=np.zeros((0, 3)), source=source)

    @property
    def count(self) -> int:
        """Number of points."""
        return int(self.times.size)

    @property
    def latest_time(self) -> float:
        if self.count == 0:
            raise TrackError(f"track {self.body!r}: has no points")
        return float(self.times[-1])

    @property
    def latest_position(self) -> np.ndarray:
        if self.count == 0:
            raise TrackError(f"track {self.body!r}: has no points")
        return self.positions[-1]

    def point_uncertainty(self) -> np.ndarray:
        """(n,) per-point uncertainty, zeros where the track carries none."""
        return self.uncertainty if self.uncertainty is not None else np.zeros(self.count)

    def append(self, time: float, position, *, uncertainty: float | None = None) -> "Track":
        """A new track with one more point at ``time`` (later than every point so far)."""
        position = np.asarray(position, dtype=float)
        if position.shape != (3,):
            raise TrackError(f"position: expected three numbers, got shape {position.shape}")
        time = float(time)
        if self.count and not time > self.times[-1]:
            raise TrackError(
                f"time: {time!r} is not later than the last point of track {self.body!r} "
                f"({float(self.times[-1])!r})"
            )
        if uncertainty is None and self.uncertainty is None:
            new_unc = None
        else:
            new_unc = np.append(self.point_uncertainty(), 0.0 if uncertainty is None else float(uncertainty))
        return Track(
            body=self.body,
            times=np.append(self.times, time),
            positions=np.vstack([self.positions, position[None, :]]),
            uncertainty=new_unc,
            source=self.source,
        )

    def since(self, time: float) -> "Track":
        """The points at or after ``time``."""
        keep = self.times >= time
        return Track(
            body=self.body,
            times=self.times[keep],
            positions=self.positions[keep],
            uncertainty=None if self.uncertainty is None else self.uncertainty[keep],
            source=self.source,
        )


@dataclass(frozen=True)
class ShiftSample:
    """The shift of one slice: its coordinate time (units of M) and the field as a callable."""

    time: float
    shift: ShiftField


#: Integration schemes: name -> (slices needed, global order at fixed cadence).
PUNCTURE_METHODS: dict[str, tuple[int, int]] = {
    "trapezoidal": (2, 2),
    "quadratic_rk3": (3, 3),
}


@dataclass(frozen=True, eq=False)
class PunctureStep:
    """One puncture step between the last two shift slices.

    Attributes:
        time: end time t1, units of M.
        position: (3,) puncture position at t1, units of M.
        method: the scheme used (a key of :data:`PUNCTURE_METHODS`).
        order: global error order of that scheme at fixed cadence.
        error_estimate: estimated position error of this step (units of M): the distance to a
            lower-order solution of the same step (Euler for "trapezoidal", trapezoidal for
            "quadratic_rk3"). It estimates the lower-order scheme's error, so it is an
            overestimate for the scheme used once the cadence resolves the motion.
        substeps: number of sub-steps the interval was split into.
    """

    time: float
    position: np.ndarray
    method: str
    order: int
    error_estimate: float
    substeps: int


def _eval_shift(field: ShiftField, x: np.ndarray, name: str) -> np.ndarray:
    beta = np.asarray(field(x[None, :]), dtype=float)
    if beta.shape != (1, 3):
        raise TrackError(f"{name}: the shift callable must return shape (1, 3) for one point, got {beta.shape}")
    if not np.all(np.isfinite(beta)):
        raise TrackError(f"{name}: the shift at {x.tolist()} is not finite (point outside the data?)")
    return beta[0]


def _lagrange_weights(times: np.ndarray, t: float) -> np.ndarray:
    w = np.ones(times.size)
    for j in range(times.size):
        for m in range(times.size):
            if m != j:
                w[j] *= (t - times[m]) / (times[j] - times[m])
    return w


def integrate_puncture(
    position,
    samples: Sequence[ShiftSample],
    *,
    method: str = "auto",
    substeps: int = 1,
) -> PunctureStep:
    """Move a puncture from ``samples[-2].time`` to ``samples[-1].time`` along -beta.

    Args:
        position: (3,) puncture position at ``samples[-2].time``, units of M.
        samples: two or three :class:`ShiftSample` in increasing time; the last two bound the
            step, a third (earlier) one lets the shift be interpolated quadratically in time.
        method: "trapezoidal" (2nd order, needs 2 samples), "quadratic_rk3" (3rd order,
            needs 3) or "auto" (the highest order the samples allow).
        substeps: split the interval into this many steps of the same scheme on the
            time-interpolated shift (reduces the step error, not the time-interpolation error).

    Returns:
        :class:`PunctureStep` at ``samples[-1].time``.
    """
    x0 = np.asarray(position, dtype=float)
    if x0.shape != (3,) or not np.all(np.isfinite(x0)):
        raise TrackError(f"position: expected three finite numbers, got {np.asarray(position).tolist()}")
    samples = list(samples)
    if len(samples) not in (2, 3):
        raise TrackError(f"samples: expected 2 or 3 shift samples, got {len(samples)}")
    times = np.array([float(s.time) for s in samples])
    if np.any(np.diff(times) <= 0) or not np.all(np.isfinite(times)):
        raise TrackError(f"samples: times must be finite and strictly increasing, got {times.tolist()}")
    if method == "auto":
        method = "quadratic_rk3" if len(samples) == 3 else "trapezoidal"
    if method not in PUNCTURE_METHODS:
        raise TrackError(f"method: unknown {method!r}; expected 'auto' or one of {sorted(PUNCTURE_METHODS)}")
    needed, order = PUNCTURE_METHODS[method]
    if len(samples) < needed:
        raise TrackError(f"method {method!r}: needs {needed} shift samples, got {len(samples)}")
    if int(substeps) < 1:
        raise TrackError(f"substeps: expected an integer >= 1, got {substeps!r}")
    substeps = int(substeps)
    used = samples[-needed:]
    used_times = times[-needed:]
    t0, t1 = float(used_times[-2]), float(used_times[-1])

    def velocity(t: float, x: np.ndarray) -> np.ndarray:
        # The shift in time: the Lagrange polynomial through the slices used, evaluated at x.
        w = _lagrange_weights(used_times, t)
        beta = np.zeros(3)
        for wj, s in zip(w, used):
            if wj != 0.0:
                beta += wj * _eval_shift(s.shift, x, f"shift at t={s.time}")
        return -beta

    h = (t1 - t0) / substeps
    x = x0.copy()
    error = 0.0
    for k in range(substeps):
        t = t0 + k * h
        if method == "trapezoidal":
            k1 = velocity(t, x)
            k2 = velocity(t + h, x + h * k1)
            x_low = x + h * k1  # Euler, for the error estimate
            x_new = x + 0.5 * h * (k1 + k2)
        else:
            k1 = velocity(t, x)
            k2 = velocity(t + 0.5 * h, x + 0.5 * h * k1)
            k3 = velocity(t + h, x - h * k1 + 2.0 * h * k2)
            # Heun from the same start: shares k1, needs one more evaluation.
            k2h = velocity(t + h, x + h * k1)
            x_low = x + 0.5 * h * (k1 + k2h)
            x_new = x + h * (k1 + 4.0 * k2 + k3) / 6.0
        # Local error estimates of the sub-steps add up (a deterministic scheme's errors do).
        error += float(np.linalg.norm(x_new - x_low))
        x = x_new
    return PunctureStep(time=t1, position=x, method=method, order=order, error_estimate=error,
                        substeps=substeps)


def advance_puncture_track(
    track: Track,
    samples: Sequence[ShiftSample],
    *,
    method: str = "auto",
    substeps: int = 1,
) -> tuple[Track, PunctureStep]:
    """Append the puncture position at ``samples[-1].time`` to ``track``.

    The track's last point must be at ``samples[-2].time``. The new point's uncertainty is
    the last point's uncertainty plus this step's error estimate (errors of a deterministic
    integrator add up, so they are summed, not added in quadrature).
    """
    if track.count == 0:
        raise TrackError(f"track {track.body!r}: needs a starting point before it can be advanced")
    samples = list(samples)
    if len(samples) < 2:
        raise TrackError(f"samples: expected 2 or 3 shift samples, got {len(samples)}")
    t_start = float(samples[-2].time)
    if not np.isclose(track.latest_time, t_start, rtol=0.0, atol=1e-9 * max(1.0, abs(t_start))):
        raise TrackError(
            f"samples: the step starts at t={t_start!r} but track {track.body!r} ends at "
            f"t={track.latest_time!r}"
        )
    step = integrate_puncture(track.latest_position, samples, method=method, substeps=substeps)
    new_track = track.append(step.time, step.position,
                             uncertainty=float(track.point_uncertainty()[-1]) + step.error_estimate)
    return new_track, step
