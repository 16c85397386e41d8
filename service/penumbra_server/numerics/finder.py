"""Find a marginally outer trapped surface (Theta = 0) near a guess.

Two methods behind one function, :func:`find_surface`:

* ``"newton"``: Newton's method on the harmonic coefficients of h, Galerkin-projected residual
  (Theta projected onto the real harmonics by the node quadrature; a square system). The
  Jacobian comes from the pointwise linearisation: Theta at a node depends on h, its first and
  second angular derivatives there, and on the fields at the node, so we perturb those six local
  quantities (one extra geometry interpolation, for h; the five derivative perturbations reuse
  the fields) and assemble with the basis-derivative matrices. Steps are damped by backtracking
  on the rms residual. (Newton on a linearised expansion operator: Thornburg, CQG 21, 743 (2004).)
* ``"flow"``: the fast flow of Gundlach, PRD 57, 863 (1998): a_lm <- a_lm - A/(1 + B l(l+1))
  (rho Theta)_lm with A = alpha/(lmax(lmax+1)) + beta, B = beta/alpha. The defaults alpha = 1,
  beta = 0.5 and the weight rho = h^2 / |dF| (which makes rho Theta's principal part the flat
  angular operator for conformally flat data) are from memory, not re-read in the paper.
  Slow but robust; the fallback when Newton fails, and the benchmark baseline.

Not converging is a result: ``FindResult.status`` from :data:`STATUS_MESSAGES`; no exception
leaves a solve for a reason the data or a step caused.

A trial step can fail in several ways: the radius turns non-positive or runs away, a point leaves
the data, a stencil needs excised data (:mod:`.excision`), the data there is not finite, the
metric is not positive definite or Theta is not finite. Every one of them shortens the step
(halved, up to ``_MAX_SHORTENINGS`` times); only when no shortened step is usable does the Newton
solve end, with the status of the last failure, and the flow is then tried from the guess.

Where the residual comes from: after the solve, max |Theta| on a second, finer node set (between
the collocation nodes) is compared with an estimate of the interpolation floor of the data (the
difference of Theta from two interpolation orders there). A residual at the floor is a success
of its own (status 10); a larger one is truncation of the surface expansion, which the finder
answers by moving the expansion centre to the surface's centroid (when that lowers it) and by
raising l_max up to ``FinderSettings.lmax_cap``; what remains at the cap is status 1 (accepted)
or 6 (not resolved).

Where the parts live: one solve's record and Theta at the nodes in finder_evaluation.py, the
Newton method in finder_newton.py, the flow in finder_flow.py; here the choice between them, the
residual's diagnosis (floor or truncation) and the result.
"""

from __future__ import annotations

import dataclasses
import time

import numpy as np

from .find_results import (  # noqa: F401  (re-exported: the finder's public names)
    CONVERGED,
    CONVERGED_AT_INTERPOLATION_FLOOR,
    CONVERGED_AT_TRUNCATION,
    DIVERGED,
    INVALID_GEOMETRY,
    LINE_SEARCH_FAILED,
    MAX_ITERATIONS,
    NEEDS_EXCISED_DATA,
    NON_FINITE_DATA,
    OUTSIDE_DATA,
    STATUS_MESSAGES,
    SUCCESS_STATUSES,
    TOO_FEW_POINTS,
    UNRESOLVED,
    FinderSettings,
    FindResult,
)
from .finder_evaluation import _evaluate, _Evaluated, _Run
from .finder_flow import _flow
from .finder_newton import _jacobian, _newton  # noqa: F401  (_jacobian re-exported: constant_expansion.py and tests use it)
from .geometry import PointGeometry  # noqa: F401  (re-exported: a callable given as data returns it)
from .interpolation import DEFAULT_ORDER
from .resolution import interpolation_floor, recentred_surface, residual_between_nodes, theta_between_nodes
from .slices import Slice
from .sources import as_tracked_source
from .surfaces import Surface, angular_grid

__all__ = [
    "FinderSettings",
    "FindResult",
    "STATUS_MESSAGES",
    "CONVERGED",
    "CONVERGED_AT_TRUNCATION",
    "MAX_ITERATIONS",
    "DIVERGED",
    "OUTSIDE_DATA",
    "LINE_SEARCH_FAILED",
    "UNRESOLVED",
    "TOO_FEW_POINTS",
    "INVALID_GEOMETRY",
    "NEEDS_EXCISED_DATA",
    "CONVERGED_AT_INTERPOLATION_FLOOR",
    "NON_FINITE_DATA",
    "SUCCESS_STATUSES",
    "find_surface",
    "expansion_of",
]

#: A residual between the nodes up to this multiple of the estimated interpolation floor counts
#: as at the floor (the estimate is itself a difference of two approximations; our choice).
_FLOOR_FACTOR = 3.0
#: Recentre when the centroid sits farther than this fraction of the mean radius from the centre.
_RECENTRE_FRACTION = 0.02
_SUCCESS = SUCCESS_STATUSES

def _solve(run: _Run, guess: Surface, settings: FinderSettings):
    """Newton (or flow) from ``guess``, the flow fallback on any Newton failure.
    Returns (status, evaluated iterate or None, iterations, projected residual, method)."""
    if settings.method == "flow":
        status, ev, nit, proj = _flow(run, guess, settings, settings.tolerance)
        return status, ev, nit, proj, "flow"
    status, ev, nit, proj = _newton(run, guess, settings)
    if status not in _SUCCESS and settings.fallback_to_flow:
        # Flow to a loose residual from the original guess, then let Newton finish.
        flow_status, flow_ev, flow_nit, _ = _flow(run, guess, settings, max(settings.tolerance, 1e-4))
        nit += flow_nit
        if flow_ev is not None and flow_status in _SUCCESS + (MAX_ITERATIONS,):
            status2, ev2, nit2, proj2 = _newton(run, flow_ev.surface, settings)
            if ev2 is not None or ev is None:
                status, ev, proj = status2, ev2 or flow_ev, proj2
            nit += nit2
            return status, ev, nit, proj, "newton+flow"
    return status, ev, nit, proj, "newton"


def find_surface(data, guess: Surface, *, settings: FinderSettings = FinderSettings()) -> FindResult:
    """Find a MOTS near ``guess``.

    Args:
        data: a :class:`Slice` (grid data; only nodes the surface's stencils reach are
            prepared), a prepared geometry (``FindResult.geometry`` of an earlier find on the same
            slice, a :class:`~.interpolation.GridGeometry`), a reference spacetime (anything with
            ``.geometry(points)``), or a callable ``points (N, 3) -> PointGeometry``.
        guess: starting surface; re-expanded to ``settings.lmax``.
        settings: :class:`FinderSettings`.

    Returns:
        :class:`FindResult`; failure to converge is reported there, not raised.
    """
    start = time.perf_counter()
    source = as_tracked_source(data, order=settings.interpolation_order)
    run = _Run(source, angular_grid(settings.lmax))
    status, ev, nit, proj, method = _solve(run, guess.with_lmax(settings.lmax), settings)
    between = floor = float("nan")
    recentred = False
    if ev is not None:
        between_theta = theta_between_nodes(source, ev.surface)  # kept for the floor estimate
        between = residual_between_nodes(source, ev.surface, between_theta)
        if status in _SUCCESS:
            status, ev, nit, proj, between, floor, recentred, run = _improve(
                source, run, settings, status, ev, nit, proj, between, between_theta)
        if status in _SUCCESS and source.slice_ is not None:
            across = _points_across(source.slice_, ev)
            if across < settings.min_points_across:
                status = TOO_FEW_POINTS
                run.uncovered_note = f"{across:.1f} grid spacings across, fewer than {settings.min_points_across}"
    message = STATUS_MESSAGES[status]
    note = {OUTSIDE_DATA: run.uncovered_note, TOO_FEW_POINTS: run.uncovered_note, INVALID_GEOMETRY: run.invalid_note,
            NEEDS_EXCISED_DATA: run.excised_note, NON_FINITE_DATA: run.non_finite_note}.get(status, "")
    if note:
        message = f"{message}: {note}"
    if run.max_hist:
        message = (
            f"{message} (max |Theta| = {run.max_hist[-1]:.3e} / M at the nodes, {between:.3e} / M between "
            f"them, interpolation floor {floor:.1e} / M, l_max {run.grid.lmax}, after {nit} iterations)"
        )
    return FindResult(
        surface=ev.surface if ev is not None else None,
        success=status in _SUCCESS,
        status=status,
        message=message,
        nit=nit,
        residual_max_history=tuple(run.max_hist),
        residual_rms_history=tuple(run.rms_hist),
        geometry_evaluations=source.evaluations,
        wall_time_s=time.perf_counter() - start,
        method=method,
        projected_residual=proj,
        residual_max_between_nodes=between,
        interpolation_floor=floor,
        recentred=recentred,
        geometry=source,
    )


def _improve(source, run, settings, status, ev, nit, proj, between, between_theta):
    """Tell interpolation floor from truncation; against truncation, recentre and raise l_max.
    ``between_theta``: Theta on the check nodes of ``ev.surface`` (or None), reused by the floor
    estimate. Returns the updated (status, ev, nit, proj, between, floor, recentred, run)."""
    recentred = False
    floor = float("nan")  # estimated only when the residual is above the tolerance
    tried_recentre = False
    while True:
        worst = max(run.max_hist[-1], between if np.isfinite(between) else np.inf)
        if worst <= settings.tolerance:
            return CONVERGED, ev, nit, proj, between, floor, recentred, run
        floor = interpolation_floor(source, ev.surface, settings.interpolation_order, between_theta)
        if np.isfinite(floor) and worst <= max(_FLOOR_FACTOR * floor, settings.tolerance):
            return CONVERGED_AT_INTERPOLATION_FLOOR, ev, nit, proj, between, floor, recentred, run
        candidates = []
        if not tried_recentre:
            tried_recentre = True
            moved = recentred_surface(ev.surface, _RECENTRE_FRACTION)
            if moved is not None:
                candidates.append((moved, True))
        if ev.surface.lmax < settings.effective_lmax_cap:
            lmax = min(settings.effective_lmax_cap, ev.surface.lmax + 4)
            candidates.append((ev.surface.with_lmax(lmax), False))
        better = None
        for surface, is_recentre in candidates:
            trial_run = _Run(source, angular_grid(surface.lmax))
            st, ev2, nit2, proj2, _ = _solve(trial_run, surface, dataclasses.replace(settings, lmax=surface.lmax))
            nit += nit2
            if st not in _SUCCESS or ev2 is None:
                continue
            theta2 = theta_between_nodes(source, ev2.surface)
            between2 = residual_between_nodes(source, ev2.surface, theta2)
            if np.isfinite(between2) and between2 < 0.7 * worst:
                better = (ev2, proj2, between2, theta2, trial_run, is_recentre)
                break
        if better is None:
            break
        ev, proj, between, between_theta, trial_run, is_recentre = better
        trial_run.max_hist[:0] = run.max_hist  # the histories run on through the re-solves
        trial_run.rms_hist[:0] = run.rms_hist
        run = trial_run
        recentred |= is_recentre
    worst = max(run.max_hist[-1], between if np.isfinite(between) else np.inf)
    if worst * ev.surface.mean_radius > settings.truncation_tolerance:
        return UNRESOLVED, ev, nit, proj, between, floor, recentred, run
    return CONVERGED_AT_TRUNCATION, ev, nit, proj, between, floor, recentred, run


def _points_across(slice_: Slice, ev: _Evaluated) -> float:
    """Smallest coordinate extent of the surface along x, y and z over the coarsest spacing among
    the patches serving its nodes. (The extent, not 2 min h: the expansion centre may sit far
    off the middle of the surface.)"""
    served = np.unique(ev.geometry.source_patch[ev.geometry.source_patch >= 0])
    spacing = max(float(np.max(slice_.patches[i].spacing)) for i in served)
    return float(np.min(np.ptp(ev.points, axis=0))) / spacing


def expansion_of(data, surface: Surface, *, order: int = DEFAULT_ORDER) -> np.ndarray:
    """Theta (1/M) at the collocation nodes of ``surface`` (``angular_grid(surface.lmax)``).

    Raises ValueError if the data does not cover every node.
    """
    source = as_tracked_source(data, order=order)
    run = _Run(source, angular_grid(surface.lmax))
    ev = _evaluate(run, surface)
    if ev is None:
        note = {NEEDS_EXCISED_DATA: run.excised_note, NON_FINITE_DATA: run.non_finite_note,
                INVALID_GEOMETRY: run.invalid_note}.get(run.last_failure, run.uncovered_note)
        raise ValueError(f"surface: {note}")
    return ev.theta
