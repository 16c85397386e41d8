"""When will the common horizon form? A forecast from the history of c_min.

c_min is the smallest expansion among the constant-expansion surfaces that enclose both bodies
(:mod:`penumbra_server.numerics.constant_expansion`); it falls to zero as the common horizon
forms (Schnetter, CQG 20, 4719 (2003); from memory). Near formation c_min passes zero smoothly
(the data change smoothly and the family's fold moves smoothly), so low-degree polynomials in
time through the latest samples extrapolate it well.

The forecast (units: times in M, c in 1/M):

* primary: a weighted least-squares quadratic in time through the last ``window`` samples
  (weights from the samples' own errors; a line with two samples, or when the parabola turns
  before zero); its root ahead is the forecast time. A quadratic because approaches accelerate:
  a line through c_min(t) forecasts late;
* variants: the line through the same samples, a parabola through the last three (when there
  are four or more) and a cubic (five or more); their roots' largest distance from the primary
  is the model part of the uncertainty;
* noise part: ``sigma_level`` times the prediction standard error of c at the root (from the fit
  covariance, scaled by the residuals when they exceed the samples' errors), divided by the slope
  there.

uncertainty = model part + noise part. Our construction; the approach-sequence test checks that
forecasts made several slices ahead bracket the time the common horizon is first found.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["FormationForecast", "FormationForecastError", "forecast_formation"]


class FormationForecastError(ValueError):
    """Bad input to :func:`forecast_formation`; the message names the field."""


@dataclass(frozen=True)
class FormationForecast:
    """A forecast of the time c_min reaches zero.

    Attributes:
        available: a forecast could be made (c_min falls); otherwise ``time`` and
            ``uncertainty`` are NaN and ``reason`` says why.
        time: forecast formation time, M.
        uncertainty: its expected error, M (model part + noise part).
        based_on: samples the fit used.
        latest_time, latest_c_min, latest_c_min_error: the newest sample (M, 1/M, 1/M).
        slope: d c_min / dt of the primary fit at the root, 1/M^2.
        reason: a sentence: the fit used, or why there is no forecast.
    """

    available: bool
    time: float
    uncertainty: float
    based_on: int
    latest_time: float
    latest_c_min: float
    latest_c_min_error: float
    slope: float
    reason: str


def _weighted_fit(t, c, err, degree):
    """Coefficients (highest first) and their covariance of a weighted polynomial fit; the
    covariance is scaled by the reduced chi^2 when the residuals exceed the errors."""
    w = 1.0 / err
    A = np.vander(t, degree + 1) * w[:, None]
    coeffs, *_ = np.linalg.lstsq(A, c * w, rcond=None)
    cov = np.linalg.pinv(A.T @ A)
    dof = len(t) - degree - 1
    if dof > 0:
        chi2 = float(np.sum(((np.vander(t, degree + 1) @ coeffs - c) * w) ** 2)) / dof
        cov = cov * max(chi2, 1.0)
    return coeffs, cov


def _root_ahead(coeffs, after: float, near: float) -> float:
    """The real root of the polynomial closest to ``near`` among those not much before ``after``."""
    roots = np.roots(coeffs)
    real = roots[np.abs(roots.imag) < 1e-9 * (1 + np.abs(roots.real))].real
    if real.size == 0:
        return float("nan")
    return float(real[np.argmin(np.abs(real - near))])


def forecast_formation(times, c_min, c_min_error, *, window: int = 6, sigma_level: float = 2.0) -> FormationForecast:
    """Forecast when c_min reaches zero.

    Args:
        times: (n,) slice times, M, strictly increasing.
        c_min: (n,) smallest enclosing expansion at those times, 1/M.
        c_min_error: (n,) its uncertainty, 1/M (> 0; zero is raised to a tiny floor).
        window: how many of the latest samples the fits use (>= 2).
        sigma_level: multiple of the prediction standard error in the noise part.
    """
    t = np.asarray(times, dtype=float).ravel()
    c = np.asarray(c_min, dtype=float).ravel()
    e = np.asarray(c_min_error, dtype=float).ravel()
    if t.size == 0:
        raise FormationForecastError("times: expected at least one sample")
    if c.shape != t.shape or e.shape != t.shape:
        raise FormationForecastError(f"c_min, c_min_error: expected {t.size} values each like times, got {c.size} and {e.size}")
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(c)) and np.all(np.isfinite(e))):
        raise FormationForecastError("times, c_min, c_min_error: expected finite numbers")
    if np.any(np.diff(t) <= 0):
        raise FormationForecastError("times: expected strictly increasing times")
    if np.any(e < 0):
        raise FormationForecastError("c_min_error: expected numbers >= 0")
    if window < 2:
        raise FormationForecastError(f"window: expected an integer >= 2, got {window}")
    k = min(window, t.size)
    tw, cw = t[-k:], c[-k:]
    ew = np.maximum(e[-k:], 1e-12 * (1.0 + np.max(np.abs(cw))))

    def none(reason):
        return FormationForecast(False, float("nan"), float("nan"), k, float(t[-1]), float(c[-1]), float(e[-1]),
                                 float("nan"), reason)

    if k < 2:
        return none("one sample: no trend yet")
    x = tw - tw[-1]  # fit about the latest time (conditioning)
    line, line_cov = _weighted_fit(x, cw, ew, 1)
    if not line[0] < 0:
        return none(f"c_min is not falling over the last {k} samples (slope {line[0]:.3g} / M^2)")
    line_root = float(-line[1] / line[0])
    if k >= 3:
        primary, cov = _weighted_fit(x, cw, ew, 2)
        root = _root_ahead(primary, 0.0, line_root)
        if not np.isfinite(root):  # the parabola turns before reaching zero: the line stands
            primary, cov, root = line, line_cov, line_root
        model_name = "quadratic" if primary is not line else "line"
    else:
        primary, cov, root, model_name = line, line_cov, line_root, "line"
    variants = [line_root] if primary is not line else []
    if k >= 4:  # the local curvature: a parabola through the last three samples
        local, _ = _weighted_fit(x[-3:], cw[-3:], ew[-3:], 2)
        variants.append(_root_ahead(local, 0.0, root))
    if k >= 5:
        cubic, _ = _weighted_fit(x, cw, ew, 3)
        variants.append(_root_ahead(cubic, 0.0, root))
    finite = [v for v in variants if np.isfinite(v)]
    model = max((abs(v - root) for v in finite), default=0.0)
    slope = float(np.polyval(np.polyder(primary), root))
    if not slope < 0:
        return none(f"the {model_name} fit is not falling where it crosses zero")
    # Prediction error of c at the root (fit covariance), turned into time by the slope there.
    g = np.vander([root], len(primary))[0]
    sigma_c = float(np.sqrt(max(g @ cov @ g, 0.0)))
    noise = sigma_level * sigma_c / abs(slope)
    if k == 2:
        model = max(model, 0.5 * abs(root))  # two samples say nothing about curvature
    reason = (f"{model_name} through the last {k} samples crosses zero at t = {root + tw[-1]:.6g} M; "
              f"{len(finite)} variant fit(s) differ by up to {model:.3g} M, fit noise {noise:.3g} M")
    return FormationForecast(True, float(root + tw[-1]), float(model + noise), k, float(t[-1]), float(c[-1]),
                             float(e[-1]), slope, reason)
