"""Forecasts of body positions over the next interval, with the error they expect: the
forecast type, the single-body polynomial model, and the fitting helpers (the bound pair's
orbit model and the entry point ``forecast_bodies`` are in :mod:`.orbit_forecast`).

Units: geometric (G = c = 1), times and lengths in the run's mass scale M.

Two models:

* ``"orbit"`` (a bound pair): the relative separation r_vec = x_A - x_B is fitted in its
  orbital plane (the plane of the recent separation vectors, from an SVD) as
  r(t) e^{i phi(t)} with r a quadratic and phi a cubic in t over the recent half orbit
  (``window_phase``). The centre of mass x_cm = (m_A x_A + m_B x_B) / M is fitted with a
  straight line, and x_A = x_cm + (m_B / M) r_vec, x_B = x_cm - (m_A / M) r_vec.
* ``"polynomial"``: each body on its own, a least-squares polynomial of degree <= 2 through
  its last ``polynomial_points`` samples; ``"static"`` when a body has a single point.

The orbit model is used for two tracks with at least ``min_points`` common sample times whose
fit is bound and clean; the criterion (first failing test wins) is:

1. at least ``min_points`` common times (shared slices);
2. bound: the Newtonian energy per unit reduced mass of the fitted relative motion at the
   latest time, E = (r'^2 + r^2 phi'^2) / 2 - M / r, is negative (coordinate gauges bend
   this; it is a screen for fly-bys, not a physical energy);
3. clean: the RMS distance between the fitted and the measured separation vectors in the
   window (in-plane and out-of-plane together) is below ``noise_tolerance`` times the mean
   separation.

Otherwise both bodies fall back to ``"polynomial"`` and the forecast's ``reason`` says why.

Expected error (the ``uncertainty`` of a forecast, per body and time, units of M): the fit is
repeated with a half-length window, a double-length window (when the track is long enough)
and one degree more in r and phi. The model part of the uncertainty is ``safety`` (1.5) times
the largest distance between the primary forecast and those variants; the noise part is
``sigma_level`` (3) times the least-squares prediction standard error propagated from the fit
residuals plus the fit's RMS misfit (for the separation and for the centre-of-mass line, the
latter added in full to both bodies, the separation's in the proportion m_other / M); the
tracks' own per-point uncertainty is added. The polynomial model does the same
with a degree lower as its variant. The factor 1.5 and the half-orbit window were chosen
while developing on synthetic leading-order (Peters) inspirals of mass ratio 1 to 3, with and
without noise; the tests use such inspirals too, so their coverage checks confirm the estimate
on that family rather than validate it independently.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from ._arrays import frozen_float_array

from .tracks import Track

__all__ = [
    "ForecastError",
    "Forecast",
    "forecast_polynomial",
    "centre_of_mass",
]


class ForecastError(ValueError):
    """Bad input to a forecast. The message names the field at fault."""


@dataclass(frozen=True, eq=False)
class Forecast:
    """Forecast positions of one or more bodies at common times.

    Attributes:
        bodies: body names, in the order of the first axis of ``positions``.
        times: (k,) forecast times, units of M.
        positions: (n_bodies, k, 3) forecast positions, units of M.
        uncertainty: (n_bodies, k) expected position error, units of M (inf: unknown).
        model: "orbit", "polynomial" or "static".
        reason: why this model was used (the fallback criterion that fired, if any).
        fit_window: (t_first, t_last) of the samples the fit used, units of M.
        details: model figures, e.g. separation, orbital_frequency (1/M), binding_energy,
            residual_rms (M) for "orbit".
    """

    bodies: tuple[str, ...]
    times: np.ndarray
    positions: np.ndarray
    uncertainty: np.ndarray
    model: str
    reason: str
    fit_window: tuple[float, float]
    details: Mapping[str, float] = field(default_factory=dict)

    def __post_init__(self) -> None:
        object.__setattr__(self, "bodies", tuple(str(b) for b in self.bodies))
        object.__setattr__(self, "times", frozen_float_array(self.times))
        object.__setattr__(self, "positions", frozen_float_array(self.positions))
        object.__setattr__(self, "uncertainty", frozen_float_array(self.uncertainty))
        nb, k = len(self.bodies), self.times.size
        if self.positions.shape != (nb, k, 3):
            raise ForecastError(f"positions: expected shape ({nb}, {k}, 3), got {self.positions.shape}")
        if self.uncertainty.shape != (nb, k):
            raise ForecastError(f"uncertainty: expected shape ({nb}, {k}), got {self.uncertainty.shape}")
        object.__setattr__(self, "details", dict(self.details))

    def index_of(self, body: str) -> int:
        try:
            return self.bodies.index(body)
        except ValueError:
            raise ForecastError(f"body: {body!r} is not in this forecast (bodies {list(self.bodies)})") from None

    def positions_of(self, body: str) -> np.ndarray:
        """(k, 3) forecast positions of ``body``."""
        return self.positions[self.index_of(body)]

    def uncertainty_of(self, body: str) -> np.ndarray:
        """(k,) expected error of ``body``'s forecast."""
        return self.uncertainty[self.index_of(body)]


def _check_times(times) -> np.ndarray:
    t = np.asarray(times, dtype=float)
    if t.ndim != 1 or t.size == 0:
        raise ForecastError(f"times: expected a non-empty 1-D array, got shape {t.shape}")
    if not np.all(np.isfinite(t)):
        raise ForecastError("times: expected finite values")
    if t.size > 1 and np.any(np.diff(t) < 0):
        raise ForecastError("times: expected non-decreasing values")
    return t


def _lsq(tau: np.ndarray, y: np.ndarray, degree: int, tau_out: np.ndarray):
    """Least-squares polynomial fit of y (n,) or (n, m) in tau.

    Returns the prediction at tau_out, its standard error (from the residuals and the normal
    matrix; zero when the fit is exact-determined) and the fitted values at tau.
    """
    A = np.vander(tau, degree + 1)
    coef, *_ = np.linalg.lstsq(A, y, rcond=None)
    fitted = A @ coef
    resid = y - fitted
    dof = tau.size - (degree + 1)
    B = np.vander(tau_out, degree + 1)
    pred = B @ coef
    if dof <= 0:
        se = np.zeros(tau_out.shape + y.shape[1:])
    else:
        s2 = np.sum(resid**2, axis=0) / dof
        normal_inv = np.linalg.pinv(A.T @ A)
        lever = np.einsum("ij,jk,ik->i", B, normal_inv, B)
        root_lever = np.sqrt(np.maximum(lever, 0.0))
        se = root_lever[:, None] * np.sqrt(s2) if y.ndim == 2 else root_lever * np.sqrt(s2)
    return pred, se, fitted


def centre_of_mass(positions_a, positions_b, *, masses: Sequence[float]) -> np.ndarray:
    """Mass-weighted average (m_A x_A + m_B x_B) / (m_A + m_B) of (..., 3) positions."""
    m_a, m_b = _check_masses(masses)
    return (m_a * np.asarray(positions_a, float) + m_b * np.asarray(positions_b, float)) / (m_a + m_b)


def _check_masses(masses) -> tuple[float, float]:
    m = np.asarray(masses, dtype=float)
    if m.shape != (2,) or not np.all(np.isfinite(m)) or np.any(m <= 0):
        raise ForecastError(f"masses: expected two positive numbers (m_A, m_B), got {np.asarray(masses).tolist()}")
    return float(m[0]), float(m[1])


def forecast_polynomial(
    track: Track,
    *,
    times,
    degree: int = 2,
    points: int = 5,
    safety: float = 1.5,
    sigma_level: float = 3.0,
) -> Forecast:
    """Extrapolate one track with a least-squares polynomial through its last ``points`` samples.

    Args:
        track: the body's track (at least one point).
        times: (k,) forecast times, units of M.
        degree: polynomial degree (lowered to points - 1 when the track is shorter).
        points: how many of the latest samples to fit.
        safety, sigma_level: see the module docstring (uncertainty estimate).

    Returns:
        A one-body :class:`Forecast` ("polynomial", or "static" with infinite uncertainty
        when the track has a single point).
    """
    t_out = _check_times(times)
    if not isinstance(track, Track):
        raise ForecastError(f"track: expected a Track, got {type(track).__name__}")
    if track.count == 0:
        raise ForecastError(f"track {track.body!r}: has no points to forecast from")
    if int(degree) < 0 or int(points) < 1:
        raise ForecastError(f"degree/points: expected degree >= 0 and points >= 1, got {degree}, {points}")
    n = min(int(points), track.count)
    t = track.times[-n:]
    x = track.positions[-n:]
    input_unc = float(np.max(track.point_uncertainty()[-n:]))
    if n == 1:
        pos = np.repeat(x[-1][None, :], t_out.size, axis=0)
        return Forecast(
            bodies=(track.body,), times=t_out, positions=pos[None], uncertainty=np.full((1, t_out.size), np.inf),
            model="static", reason=f"track {track.body!r} has a single point: no motion can be inferred",
            fit_window=(float(t[0]), float(t[-1])),
        )
    deg = min(int(degree), n - 1)
    scale = max(float(t[-1] - t[0]), 1e-300)
    tau = (t - t[-1]) / scale
    tau_out = (t_out - t[-1]) / scale
    pred, se, _ = _lsq(tau, x, deg, tau_out)
    if deg >= 1:
        lower, _, _ = _lsq(tau, x, deg - 1, tau_out)
        model_err = np.linalg.norm(pred - lower, axis=1)
    else:
        model_err = np.full(t_out.size, np.inf)
    unc = safety * model_err + sigma_level * np.linalg.norm(se, axis=1) + input_unc
    return Forecast(
        bodies=(track.body,), times=t_out, positions=pred[None], uncertainty=unc[None],
        model="polynomial",
        reason=f"degree-{deg} least-squares polynomial through the last {n} samples",
        fit_window=(float(t[0]), float(t[-1])),
    )
