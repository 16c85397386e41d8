"""The fast flow (Gundlach, PRD 57, 863 (1998)): the finder's robust, slow method, its fallback
when Newton fails and the benchmark baseline. The step and its defaults are described in
finder.py's docstring.
"""

from __future__ import annotations

import numpy as np

from .find_results import CONVERGED, CONVERGED_AT_TRUNCATION, DIVERGED, INVALID_GEOMETRY, MAX_ITERATIONS, FinderSettings
from .finder_evaluation import _MAX_SHORTENINGS, _diverged, _evaluate, _Evaluated, _projected_rms, _Run
from .surfaces import Surface, degree_of_index

def _flow(run: _Run, guess: Surface, settings: FinderSettings, tolerance: float) -> tuple[int, _Evaluated | None, int, float]:
    """Gundlach's fast flow. The projected residual here is that of rho Theta / mean(rho)."""
    lmax = guess.lmax
    ell = degree_of_index(lmax)
    alpha, beta = settings.flow_alpha, settings.flow_beta
    A = alpha / (lmax * (lmax + 1)) + beta
    B = beta / alpha
    gain = A / (1.0 + B * ell * (ell + 1))
    limit = settings.max_radius_factor * guess.mean_radius
    proj = float("nan")
    if _diverged(guess, run, limit):
        return DIVERGED, None, 0, proj
    ev = _evaluate(run, guess)
    if ev is None:
        return run.last_failure, None, 0, proj
    for it in range(settings.flow_iterations + 1):
        with np.errstate(invalid="ignore", divide="ignore"):
            rho = ev.rd.h**2 / ev.u
        weighted = rho * ev.theta
        proj = _projected_rms(run, weighted) / float(np.mean(rho))
        if run.max_hist[-1] <= tolerance:
            return CONVERGED, ev, it, proj
        if proj <= 1e-3 * tolerance:
            return CONVERGED_AT_TRUNCATION, ev, it, proj
        if it == settings.flow_iterations:
            break
        step = -gain * run.grid.project(weighted)
        if not np.all(np.isfinite(step)):
            return INVALID_GEOMETRY, ev, it, proj
        factor = 1.0
        following, failure = None, DIVERGED
        for _ in range(_MAX_SHORTENINGS):
            surface = Surface(ev.surface.centre, lmax, ev.surface.coefficients + factor * step)
            if not _diverged(surface, run, limit):
                following = _evaluate(run, surface)
                if following is not None:
                    break
                failure = run.last_failure
            factor *= 0.5  # any failed trial is shortened
        if following is None:
            return failure, ev, it + 1, proj
        ev = following
    return MAX_ITERATIONS, ev, settings.flow_iterations, proj
