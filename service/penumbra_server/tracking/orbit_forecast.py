"""A bound pair's forecast (the ``"orbit"`` model of :mod:`.forecast`), and the entry point that
picks the model for one or two tracks.

Units: geometric (G = c = 1), times and lengths in the run's mass scale M.

The relative separation r_vec = x_A - x_B is fitted in its orbital plane (the plane of the
recent separation vectors, from an SVD) as r(t) e^{i phi(t)} with r a quadratic and phi a cubic
in t over the recent half orbit (``window_phase``); the centre of mass with a straight line.
The criterion for using it, and the expected error, are stated in :mod:`.forecast`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .forecast import Forecast, ForecastError, _check_masses, _check_times, _lsq, forecast_polynomial
from .tracks import Track

__all__ = ["forecast_pair", "forecast_bodies"]


def _common_samples(a: Track, b: Track):
    """Indices of the sample times the two tracks share (same slices), in time order."""
    if a.count == 0 or b.count == 0:
        return np.zeros(0, int), np.zeros(0, int)
    j = np.searchsorted(b.times, a.times)
    j = np.clip(j, 0, b.count - 1)
    jm = np.clip(j - 1, 0, b.count - 1)
    pick = np.where(np.abs(b.times[jm] - a.times) < np.abs(b.times[j] - a.times), jm, j)
    tol = 1e-9 * np.maximum(1.0, np.abs(a.times))
    ok = np.abs(b.times[pick] - a.times) <= tol
    return np.nonzero(ok)[0], pick[ok]


@dataclass(frozen=True)
class _OrbitFit:
    rel: np.ndarray          # (k, 3) forecast separation vectors
    se: np.ndarray           # (k,) prediction standard error of the separation
    residual_rms: float      # RMS misfit of the separation vectors in the window
    mean_separation: float
    r_now: float
    dr_now: float
    omega_now: float


def _plane(rel: np.ndarray):
    """Orthonormal in-plane axes e1, e2 and the normal of the separation vectors' plane."""
    _, s, vt = np.linalg.svd(rel, full_matrices=False)
    e1 = vt[0]
    if s.size < 2 or s[1] <= 1e-12 * s[0]:
        # Straight-line (head-on) motion: any axis perpendicular to it will do.
        trial = np.eye(3)[np.argmin(np.abs(e1))]
        e2 = trial - (trial @ e1) * e1
        e2 /= np.linalg.norm(e2)
    else:
        e2 = vt[1]
    return e1, e2, np.cross(e1, e2)


def _fit_orbit(t: np.ndarray, rel: np.ndarray, t_out: np.ndarray, deg_r: int, deg_phi: int) -> _OrbitFit:
    e1, e2, normal = _plane(rel)
    u, v, w = rel @ e1, rel @ e2, rel @ normal
    r = np.hypot(u, v)
    phi = np.unwrap(np.arctan2(v, u))
    scale = max(float(t[-1] - t[0]), 1e-300)
    tau = (t - t[-1]) / scale
    tau_out = (t_out - t[-1]) / scale
    deg_r = min(deg_r, t.size - 1)
    deg_phi = min(deg_phi, t.size - 1)
    r_out, r_se, r_fit = _lsq(tau, r, deg_r, tau_out)
    p_out, p_se, p_fit = _lsq(tau, phi, deg_phi, tau_out)
    rel_out = r_out[:, None] * (np.cos(p_out)[:, None] * e1 + np.sin(p_out)[:, None] * e2)
    fit_in = r_fit[:, None] * (np.cos(p_fit)[:, None] * e1 + np.sin(p_fit)[:, None] * e2)
    resid = np.sqrt(np.mean(np.sum((fit_in - rel) ** 2, axis=1)))
    dr = np.polyval(np.polyder(np.polyfit(tau, r, deg_r)), 0.0) / scale
    om = np.polyval(np.polyder(np.polyfit(tau, phi, deg_phi)), 0.0) / scale
    return _OrbitFit(
        rel=rel_out,
        se=np.hypot(r_se, np.abs(r_out) * p_se),
        residual_rms=float(max(resid, np.sqrt(np.mean(w**2)))),
        mean_separation=float(np.mean(r)),
        r_now=float(r_fit[-1]),
        dr_now=float(dr),
        omega_now=float(om),
    )


def forecast_pair(
    track_a: Track,
    track_b: Track,
    *,
    masses: Sequence[float],
    times,
    window_phase: float = np.pi,
    min_points: int = 8,
    max_points: int = 400,
    noise_tolerance: float = 0.02,
    safety: float = 1.5,
    sigma_level: float = 3.0,
    polynomial_points: int = 5,
) -> Forecast:
    """Forecast a pair of bodies, with the orbit model when the pair passes the criterion.

    Args:
        track_a, track_b: the two bodies' tracks (sampled at shared slice times).
        masses: (m_A, m_B) > 0, e.g. irreducible masses, units of M.
        times: (k,) forecast times, units of M.
        window_phase: orbital phase (radians) the primary fit window spans, back from the
            latest sample (at least ``min_points`` samples).
        min_points: fewest shared samples the orbit model needs.
        max_points: most recent shared samples considered (bounds the cost).
        noise_tolerance: fallback when the fit's RMS misfit exceeds this fraction of the
            mean separation.
        safety, sigma_level: factors of the uncertainty estimate (module docstring).
        polynomial_points: samples per body for the polynomial fallback.

    Returns:
        A two-body :class:`Forecast` (bodies in the order A, B).
    """
    t_out = _check_times(times)
    for name, tr in (("track_a", track_a), ("track_b", track_b)):
        if not isinstance(tr, Track):
            raise ForecastError(f"{name}: expected a Track, got {type(tr).__name__}")
    if track_a.body == track_b.body:
        raise ForecastError(f"track_b: both tracks are for body {track_a.body!r}")
    m_a, m_b = _check_masses(masses)
    m_tot = m_a + m_b
    if int(min_points) < 6:
        raise ForecastError(f"min_points: expected at least 6 (a cubic phase needs 4), got {min_points}")
    if not window_phase > 0:
        raise ForecastError(f"window_phase: expected a positive angle in radians, got {window_phase!r}")

    def fallback(reason: str) -> Forecast:
        parts = [forecast_polynomial(tr, times=t_out, points=polynomial_points, safety=safety,
                                     sigma_level=sigma_level) for tr in (track_a, track_b)]
        models = {p.model for p in parts}
        return Forecast(
            bodies=(track_a.body, track_b.body), times=t_out,
            positions=np.concatenate([p.positions for p in parts]),
            uncertainty=np.concatenate([p.uncertainty for p in parts]),
            model="polynomial" if "polynomial" in models else "static",
            reason=f"orbit model not used: {reason}; " + "; ".join(p.reason for p in parts),
            fit_window=(min(p.fit_window[0] for p in parts), max(p.fit_window[1] for p in parts)),
        )

    ia, ib = _common_samples(track_a, track_b)
    if ia.size < min_points:
        return fallback(f"only {ia.size} shared sample times (needs {min_points})")
    ia, ib = ia[-max_points:], ib[-max_points:]
    t = track_a.times[ia]
    xa, xb = track_a.positions[ia], track_b.positions[ib]
    rel = xa - xb
    if np.any(np.linalg.norm(rel, axis=1) <= 0):
        return fallback("the bodies coincide at a sample")

    # Window: back from the latest sample until the in-plane phase has turned window_phase.
    e1, e2, _ = _plane(rel)
    phase = np.unwrap(np.arctan2(rel @ e2, rel @ e1))
    turned = np.abs(phase - phase[-1])
    beyond = np.nonzero(turned > window_phase)[0]
    start = int(beyond[-1]) + 1 if beyond.size else 0
    start = max(0, min(start, t.size - min_points))
    n = t.size - start

    primary = _fit_orbit(t[start:], rel[start:], t_out, 2, 3)
    energy = 0.5 * (primary.dr_now**2 + (primary.r_now * primary.omega_now) ** 2) - m_tot / primary.r_now
    if not energy < 0:
        return fallback(f"unbound fit (Newtonian energy per reduced mass {energy:.3g} >= 0)")
    if primary.residual_rms > noise_tolerance * primary.mean_separation:
        return fallback(
            f"noisy track (fit misfit {primary.residual_rms:.3g} M > {noise_tolerance} x mean separation "
            f"{primary.mean_separation:.3g} M)"
        )

    variants = []
    half = max(min_points, n // 2)
    if half < n:
        variants.append(_fit_orbit(t[-half:], rel[-half:], t_out, 2, 3).rel)
    longer = min(t.size, 2 * n)
    if longer > n:
        variants.append(_fit_orbit(t[-longer:], rel[-longer:], t_out, 2, 3).rel)
    variants.append(_fit_orbit(t[start:], rel[start:], t_out, 3, 4).rel)
    model_err = np.max([np.linalg.norm(v - primary.rel, axis=1) for v in variants], axis=0)
    rel_unc = safety * model_err + sigma_level * primary.se + primary.residual_rms

    # Centre of mass: a straight line through the window's mass-weighted averages.
    cm = (m_a * xa + m_b * xb) / m_tot
    scale = max(float(t[-1] - t[start]), 1e-300)
    cm_out, cm_se, cm_fit = _lsq((t[start:] - t[-1]) / scale, cm[start:], 1, (t_out - t[-1]) / scale)
    cm_resid = float(np.sqrt(np.mean(np.sum((cm_fit - cm[start:]) ** 2, axis=1))))
    cm_unc = sigma_level * np.linalg.norm(cm_se, axis=1) + cm_resid

    input_unc = max(float(np.max(track_a.point_uncertainty()[ia[start:]])),
                    float(np.max(track_b.point_uncertainty()[ib[start:]])))
    pos_a = cm_out + (m_b / m_tot) * primary.rel
    pos_b = cm_out - (m_a / m_tot) * primary.rel
    unc_a = cm_unc + (m_b / m_tot) * rel_unc + input_unc
    unc_b = cm_unc + (m_a / m_tot) * rel_unc + input_unc
    return Forecast(
        bodies=(track_a.body, track_b.body), times=t_out,
        positions=np.stack([pos_a, pos_b]), uncertainty=np.stack([unc_a, unc_b]),
        model="orbit",
        reason=(f"bound pair: orbital-plane fit (quadratic r, cubic phase) over the last {n} shared "
                f"samples ({float(turned[start]):.2f} rad of phase)"),
        fit_window=(float(t[start]), float(t[-1])),
        details={
            "separation": primary.r_now,
            "separation_rate": primary.dr_now,
            "orbital_frequency": primary.omega_now,
            "binding_energy": float(energy),
            "residual_rms": primary.residual_rms,
            "window_points": float(n),
        },
    )


def forecast_bodies(
    tracks: Sequence[Track],
    *,
    times,
    masses: Sequence[float] | None = None,
    **options,
) -> Forecast:
    """Forecast one body (polynomial) or a pair (orbit model when it qualifies).

    Args:
        tracks: one or two tracks.
        times: (k,) forecast times, units of M.
        masses: (m_A, m_B) for a pair; ignored for one body.
        options: passed to :func:`forecast_pair` or :func:`forecast_polynomial`.
    """
    tracks = list(tracks)
    if len(tracks) == 1:
        return forecast_polynomial(tracks[0], times=times, **options)
    if len(tracks) == 2:
        if masses is None:
            raise ForecastError("masses: a pair forecast needs (m_A, m_B)")
        return forecast_pair(tracks[0], tracks[1], masses=masses, times=times, **options)
    raise ForecastError(f"tracks: expected one or two tracks, got {len(tracks)}")
