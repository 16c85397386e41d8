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
"""

from __future__ import annotations

import dataclasses
import functools
import time
from dataclasses import dataclass, field

import numpy as np

from .excision import ExcisedDataError
from .expansion import GeometryTerms, expansion_from, geometry_terms, level_set_derivatives
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
from .geometry import PointGeometry
from .interpolation import DEFAULT_ORDER
from .resolution import interpolation_floor, recentred_surface, residual_between_nodes
from .slices import DegenerateMetricError, Slice, SliceError
from .sources import TrackedSource, as_tracked_source
from .surfaces import (
    AngularGrid,
    RadiusDerivatives,
    Surface,
    angular_grid,
    degree_of_index,
    unit_vectors,
)

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

#: Halvings of a failed trial step before the solve gives up.
_MAX_SHORTENINGS = 10
#: A residual between the nodes up to this multiple of the estimated interpolation floor counts
#: as at the floor (the estimate is itself a difference of two approximations; our choice).
_FLOOR_FACTOR = 3.0
#: Recentre when the centroid sits farther than this fraction of the mean radius from the centre.
_RECENTRE_FRACTION = 0.02
_SUCCESS = SUCCESS_STATUSES


@dataclass
class _Run:
    """Book-keeping of one solve (local to the call)."""

    source: TrackedSource
    grid: AngularGrid
    max_hist: list[float] = field(default_factory=list)
    rms_hist: list[float] = field(default_factory=list)
    uncovered_note: str = ""
    invalid_note: str = ""
    excised_note: str = ""
    non_finite_note: str = ""
    last_failure: int = OUTSIDE_DATA  # why the latest _evaluate returned None


@dataclass(frozen=True, eq=False)
class _Evaluated:
    surface: Surface
    rd: RadiusDerivatives
    points: np.ndarray
    geometry: PointGeometry
    theta: np.ndarray
    u: np.ndarray
    shift: float  # radial shift (M) of the points for the Jacobian's h column
    shifted: object  # () -> PointGeometry at the points moved out by ``shift``
    normal_up: np.ndarray | None = None  # s^i (N, 3), for the Jacobian
    terms: GeometryTerms | None = None  # the geometry's part of Theta, shared by the Jacobian
    frame: tuple | None = None  # unit_vectors at the nodes: n, e_theta, e_phi (N, 3) each


def _evaluate(run: _Run, surface: Surface) -> _Evaluated | None:
    """Theta at the nodes of ``surface``; None (with a note) when data is missing there."""
    rd = surface.on_grid(run.grid)
    frame = _frame(run.grid)
    pts = surface.centre + rd.h[:, None] * frame[0]  # surface.points(rd), frame reused
    if not np.all(np.isfinite(pts)):
        run.last_failure = DIVERGED
        return None
    shift = 1e-7 * float(np.mean(rd.h))
    try:
        geo, shifted = run.source.evaluate(pts, shift * frame[0])
    except ExcisedDataError as exc:
        run.last_failure = NEEDS_EXCISED_DATA
        run.excised_note = str(exc)
        return None
    except DegenerateMetricError as exc:
        run.last_failure = INVALID_GEOMETRY
        run.invalid_note = str(exc)
        return None
    except SliceError as exc:
        run.last_failure = NON_FINITE_DATA
        run.non_finite_note = str(exc)
        return None
    if not geo.covered.all():
        bad = ~geo.covered
        t, p = run.grid.theta[bad], run.grid.phi[bad]
        run.last_failure = OUTSIDE_DATA
        run.uncovered_note = (
            f"{int(bad.sum())} of {bad.size} surface points have no patch whose stencil covers them "
            f"(theta {np.degrees(t.min()):.0f}..{np.degrees(t.max()):.0f} deg, phi "
            f"{np.degrees(p.min()):.0f}..{np.degrees(p.max()):.0f} deg); {run.source.describe_uncovered(pts[bad])}"
        )
        return None
    try:
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            level_set = level_set_derivatives(rd, frame)
            geometry_part = geometry_terms(geo)
            terms = expansion_from(level_set.dF, level_set.ddF, geometry_part)
    except np.linalg.LinAlgError:  # a singular metric at some point
        run.last_failure = INVALID_GEOMETRY
        run.invalid_note = "the metric is singular at some surface points"
        return None
    th = terms.theta
    if not np.all(np.isfinite(th)):
        run.last_failure = INVALID_GEOMETRY
        run.invalid_note = f"{int((~np.isfinite(th)).sum())} of {th.size} surface points"
        return None
    run.max_hist.append(float(np.max(np.abs(th))))
    run.rms_hist.append(float(np.sqrt(np.sum(run.grid.weights * th**2) / (4 * np.pi))))
    return _Evaluated(surface, rd, pts, geo, th, terms.u, shift, shifted, terms.normal_up, geometry_part, frame)


def _projected_rms(run: _Run, values: np.ndarray) -> float:
    return float(np.linalg.norm(run.grid.project(values)) / np.sqrt(4 * np.pi))


def _jacobian(run: _Run, ev: _Evaluated) -> np.ndarray:
    """d(projected Theta)/d(coefficients), square ((lmax+1)^2).

    Theta at a node depends on h, its first and second angular derivatives there and on the
    fields there. h moves the point, so its column uses the interpolant shifted along n; h_t and
    h_p enter nonlinearly (central differences, one batched evaluation on the iterate's geometry
    terms); h_tt, h_tp and h_pp enter linearly through (gamma^ij - s^i s^j) d_i d_j F / u alone,
    so their columns are exact: d_i d_j F changes by -grad(theta)_i grad(theta)_j per unit h_tt
    and likewise for the others.
    """
    rd, geo = ev.rd, ev.geometry
    scale = float(np.mean(rd.h))
    # h: moves the point too, so the fields come from the interpolant shifted along n.
    try:
        geo_h = ev.shifted()
    except (ExcisedDataError, SliceError):
        geo_h = geo  # at an excision boundary or next to bad data: as at the data edge
    if not geo_h.covered.all():
        geo_h = geo  # at the data edge: drop the field variation rather than fail
    terms_h = ev.terms if geo_h is geo else geometry_terms(geo_h)
    eps_first = 1e-5 * scale
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        ls_h = level_set_derivatives(rd.replace(h=rd.h + ev.shift), ev.frame)
        d_h = (expansion_from(ls_h.dF, ls_h.ddF, terms_h).theta - ev.theta) / ev.shift
        # The four shapes h_t +- eps, h_p +- eps on the same directions and geometry, batched.
        step = np.array([eps_first, -eps_first, 0.0, 0.0])[:, None]
        variants = rd.replace(h_t=rd.h_t + step, h_p=rd.h_p + step[[2, 3, 0, 1]])
        ls = level_set_derivatives(variants, ev.frame)
        theta = expansion_from(ls.dF, ls.ddF, ev.terms).theta
        d_t = (theta[0] - theta[1]) / (2 * eps_first)
        d_p = (theta[2] - theta[3]) / (2 * eps_first)
        _, e_t, e_p = ev.frame
        grad_t = e_t / rd.h[:, None]
        grad_p = e_p / (rd.h * np.sin(rd.theta))[:, None]
        s_up = ev.normal_up
        proj = ev.terms.ginv - s_up[:, :, None] * s_up[:, None, :]
        proj_t = np.einsum("nij,nj->ni", proj, grad_t)
        d_tt = -np.einsum("ni,ni->n", proj_t, grad_t) / ev.u
        d_tp = -2.0 * np.einsum("ni,ni->n", proj_t, grad_p) / ev.u
        d_pp = -np.einsum("ni,nij,nj->n", grad_p, proj, grad_p) / ev.u
    stacked, projector = _jacobian_bases(run.grid)
    local = np.stack([d_h, d_t, d_p, d_tt, d_tp, d_pp], axis=1)  # (N, 6): dTheta / d(h, h_t, ..., h_pp)
    J_nodes = np.matmul(local[:, None, :], stacked)[:, 0, :]  # (N, n_coef)
    return projector @ J_nodes


@functools.lru_cache(maxsize=16)
def _frame(grid: AngularGrid) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`unit_vectors` at the grid's nodes, read-only (memoised like :func:`_jacobian_bases`)."""
    frame = unit_vectors(grid.theta, grid.phi)
    for vectors in frame:
        vectors.setflags(write=False)
    return frame


@functools.lru_cache(maxsize=16)
def _jacobian_bases(grid: AngularGrid) -> tuple[np.ndarray, np.ndarray]:
    """(N, 6, n_coef) Y and its derivatives (theta, phi, theta theta, theta phi, phi phi) node by
    node, and the projection (n_coef, N) = Y^T diag(weights), read-only. Memoised: a pure
    function of the grid, which :func:`angular_grid` itself memoises."""
    B = grid.basis
    stacked = np.ascontiguousarray(np.stack([B.Y, B.d_theta, B.d_phi, B.d_theta_theta, B.d_theta_phi, B.d_phi_phi], axis=1))
    projector = np.ascontiguousarray((grid.weights[:, None] * B.Y).T)
    stacked.setflags(write=False)
    projector.setflags(write=False)
    return stacked, projector


def _diverged(surface: Surface, run: _Run, limit: float) -> bool:
    h = run.grid.basis.Y @ surface.coefficients  # h alone: no derivatives needed here
    return bool(not np.all(np.isfinite(h)) or np.min(h) <= 0 or np.max(h) > limit)


def _newton_step(run: _Run, ev: _Evaluated) -> np.ndarray | None:
    """The Newton step in the coefficients, None when the linearisation is not finite."""
    J = _jacobian(run, ev)
    rhs = run.grid.project(ev.theta)
    if not (np.all(np.isfinite(J)) and np.all(np.isfinite(rhs))):
        return None
    try:
        step = np.linalg.solve(J, -rhs)
    except np.linalg.LinAlgError:
        step = np.linalg.lstsq(J, -rhs, rcond=None)[0]
    return step if np.all(np.isfinite(step)) else None


def _newton(run: _Run, guess: Surface, settings: FinderSettings) -> tuple[int, _Evaluated | None, int, float]:
    """(status, last evaluated iterate, iterations, projected residual)."""
    limit = settings.max_radius_factor * max(guess.mean_radius, 1e-300)
    if _diverged(guess, run, limit):
        return DIVERGED, None, 0, float("nan")
    ev = _evaluate(run, guess)
    if ev is None:
        return run.last_failure, None, 0, float("nan")
    proj = _projected_rms(run, ev.theta)
    for it in range(1, settings.max_iterations + 1):
        if run.max_hist[-1] <= settings.tolerance:
            return CONVERGED, ev, it - 1, proj
        if proj <= settings.tolerance:
            return CONVERGED_AT_TRUNCATION, ev, it - 1, proj
        step = _newton_step(run, ev)
        if step is None:
            return INVALID_GEOMETRY, ev, it, proj
        # Backtrack on the projected residual: it is what the Galerkin Newton step reduces; the
        # node residual also holds the part beyond l_max, which no step can remove. A trial that
        # cannot be evaluated at all (any reason) is shortened like one that does not reduce it.
        lam = 1.0
        accepted = None
        failure = LINE_SEARCH_FAILED
        for _ in range(_MAX_SHORTENINGS):
            trial = Surface(ev.surface.centre, ev.surface.lmax, ev.surface.coefficients + lam * step)
            if _diverged(trial, run, limit):
                failure = DIVERGED
                lam *= 0.5
                continue
            cand = _evaluate(run, trial)
            if cand is None:
                failure = run.last_failure
                lam *= 0.5
                continue
            cand_proj = _projected_rms(run, cand.theta)
            if cand_proj < (1.0 - 1e-4 * lam) * proj or cand_proj <= settings.tolerance:
                accepted = cand
                break
            # Rejected trial: drop its history entry so the history follows accepted iterates.
            failure = LINE_SEARCH_FAILED
            run.max_hist.pop()
            run.rms_hist.pop()
            lam *= 0.5
        if accepted is None:
            return failure, ev, it, proj
        ev = accepted
        proj = cand_proj
    if run.max_hist[-1] <= settings.tolerance:
        return CONVERGED, ev, settings.max_iterations, proj
    if proj <= settings.tolerance:
        return CONVERGED_AT_TRUNCATION, ev, settings.max_iterations, proj
    return MAX_ITERATIONS, ev, settings.max_iterations, proj


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
        between = residual_between_nodes(source, ev.surface)
        if status in _SUCCESS:
            status, ev, nit, proj, between, floor, recentred, run = _improve(
                source, run, settings, status, ev, nit, proj, between)
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


def _improve(source, run, settings, status, ev, nit, proj, between):
    """Tell interpolation floor from truncation; against truncation, recentre and raise l_max.
    Returns the updated (status, ev, nit, proj, between, floor, recentred, run)."""
    recentred = False
    floor = float("nan")  # estimated only when the residual is above the tolerance
    tried_recentre = False
    while True:
        worst = max(run.max_hist[-1], between if np.isfinite(between) else np.inf)
        if worst <= settings.tolerance:
            return CONVERGED, ev, nit, proj, between, floor, recentred, run
        floor = interpolation_floor(source, ev.surface, settings.interpolation_order)
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
            between2 = residual_between_nodes(source, ev2.surface)
            if np.isfinite(between2) and between2 < 0.7 * worst:
                better = (ev2, proj2, between2, trial_run, is_recentre)
                break
        if better is None:
            break
        ev, proj, between, trial_run, is_recentre = better
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
