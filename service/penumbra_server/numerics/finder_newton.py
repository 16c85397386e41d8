"""Newton's method on the harmonic coefficients of h: the Jacobian of the Galerkin-projected
Theta from the pointwise linearisation, and the damped Newton iteration (backtracking on the
projected residual). The method is described in finder.py's docstring.
"""

from __future__ import annotations

import functools

import numpy as np
from scipy.special import sph_legendre_p_all

from .excision import ExcisedDataError
from .expansion import expansion_from, expansion_variation, geometry_terms, level_set_derivatives
from .find_results import (
    CONVERGED,
    CONVERGED_AT_TRUNCATION,
    DIVERGED,
    INVALID_GEOMETRY,
    LINE_SEARCH_FAILED,
    MAX_ITERATIONS,
    FinderSettings,
)
from .finder_evaluation import _MAX_SHORTENINGS, _diverged, _evaluate, _Evaluated, _projected_rms, _Run, _tensors
from .slices import SliceError
from .surfaces import AngularGrid, Surface, _azimuthal, _degree_order, _project_columns

def _jacobian(run: _Run, ev: _Evaluated) -> np.ndarray:
    """d(projected Theta)/d(coefficients), square ((lmax+1)^2).

    Theta at a node depends on h, its first and second angular derivatives there and on the
    fields there. h moves the point, so its column uses the interpolant shifted along n (a
    difference quotient over ``ev.shift``). The others enter through d_i F and d_i d_j F alone
    (h_t, h_p through both, h_tt, h_tp, h_pp linearly through d_i d_j F), on the iterate's
    geometry: their columns are exact, from :func:`expansion_variation` (delta d_i F per unit h_t
    is -e_theta / h, per unit h_p -e_phi / (h sin theta); delta d_i d_j F per unit h_k is -T_k /
    h^2 with the angular tensors T of :func:`angular_tensors`).
    """
    rd, geo = ev.rd, ev.geometry
    # h: moves the point too, so the fields come from the interpolant shifted along n.
    try:
        geo_h = ev.shifted()
    except (ExcisedDataError, SliceError):
        geo_h = geo  # at an excision boundary or next to bad data: as at the data edge
    if not geo_h.covered.all():
        geo_h = geo  # at the data edge: drop the field variation rather than fail
    terms_h = ev.terms if geo_h is geo else geometry_terms(geo_h)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        tensors = _tensors(run.grid)
        ls_h = level_set_derivatives(rd.replace(h=rd.h + ev.shift), ev.frame, tensors)
        d_h = (expansion_from(ls_h.dF, ls_h.ddF, terms_h).theta - ev.theta) / ev.shift
        level_set = ev.level_set if ev.level_set is not None else level_set_derivatives(rd, ev.frame, tensors)
        variation = expansion_variation(level_set.dF, level_set.ddF, ev.terms, ev.expansion)
        inv_h = 1.0 / rd.h
        local = np.empty((rd.h.size, 6))  # dTheta / d(h, h_t, h_p, h_tt, h_tp, h_pp) node by node
        local[:, 0] = d_h
        # P^ij T_k,ij / u for the five angular tensors in one batched product.
        local[:, 1:] = (tensors[1] @ variation.hessian_weight.reshape(-1, 9, 1))[:, :, 0]
        local[:, 1:] *= -(inv_h**2)[:, None]
        _, e_t, e_p = ev.frame
        local[:, 1] -= np.sum(variation.slope * e_t, axis=1) * inv_h
        local[:, 2] -= np.sum(variation.slope * e_p, axis=1) * inv_h / np.sin(rd.theta)
    J_nodes = _nodal_columns(run.grid, local)  # (N, n_coef)
    # The factored projection wins from l_max 8 up (measured: 0.15 against 0.54 ms at l_max 12,
    # 0.5 against 2.7 ms at 16); below, the dense product's single call is faster.
    return _jacobian_bases(run.grid)[1] @ J_nodes if run.grid.lmax < 8 else _project_columns(run.grid, J_nodes)


def _nodal_columns(grid: AngularGrid, local: np.ndarray) -> np.ndarray:
    """(N, n_coef) sum_k local[:, k] B_k for local (N, 6) at the grid's nodes and B_k the
    harmonics' values and derivatives (h, theta, phi, theta theta, theta phi, phi phi) there.
    Each B_k is a polar factor of the ring times an azimuthal factor of the meridian, so the sum
    is made from those small tables (grouped by the azimuthal factor) instead of the six (N,
    n_coef) matrices: 3.2 MB at l_max 12, whose reading from memory after other work cost more
    than the products (measured: about 0.6 ms less per Newton iteration at l_max 12)."""
    polar, azimuthal = _node_factors(grid)  # (n_theta, 3, C): P, P_t, P_tt; (3, n_phi, C): f, f_p, f_pp
    rings = local.reshape(grid.n_theta, grid.n_phi, 6)
    out = (rings[:, :, [0, 1, 3]] @ polar) * azimuthal[0]  # h, h_t, h_tt: P, P_t, P_tt times f
    out += (rings[:, :, [2, 4]] @ polar[:, :2]) * azimuthal[1]  # h_p, h_tp: P, P_t times f_p
    out += (rings[:, :, 5:] @ polar[:, :1]) * azimuthal[2]  # h_pp: P times f_pp
    return out.reshape(grid.size, -1)


@functools.lru_cache(maxsize=16)
def _node_factors(grid: AngularGrid) -> tuple[np.ndarray, np.ndarray]:
    """For :func:`_nodal_columns`: (n_theta, 3, n_coef) P_l^|m| and its first two theta
    derivatives at the rings, (3, n_phi, n_coef) the azimuthal factors and their first two phi
    derivatives (as in :func:`harmonic_basis`). Read-only; memoised like :func:`_jacobian_bases`."""
    l, m = _degree_order(grid.lmax)
    legendre = sph_legendre_p_all(grid.lmax, grid.lmax, grid.theta[:: grid.n_phi], diff_n=2)  # [d, l, m, ring]
    polar = np.ascontiguousarray(np.moveaxis(legendre[:, l, np.abs(m)], 2, 0))  # (ring, d, coefficient)
    azimuthal = np.stack([_azimuthal(m, grid.phi[: grid.n_phi], d) for d in range(3)])
    for array in (polar, azimuthal):
        array.setflags(write=False)
    return polar, azimuthal


@functools.lru_cache(maxsize=16)
def _jacobian_bases(grid: AngularGrid) -> tuple[np.ndarray, np.ndarray]:
    """(N, 6, n_coef) Y and its derivatives (theta, phi, theta theta, theta phi, phi phi) node by
    node (the dense form of :func:`_nodal_columns`, for checks), and the projection (n_coef, N)
    = Y^T diag(weights), read-only. Memoised: a pure function of the grid, which
    :func:`angular_grid` itself memoises."""
    B = grid.basis
    stacked = np.ascontiguousarray(np.stack([B.Y, B.d_theta, B.d_phi, B.d_theta_theta, B.d_theta_phi, B.d_phi_phi], axis=1))
    projector = np.ascontiguousarray((grid.weights[:, None] * B.Y).T)
    stacked.setflags(write=False)
    projector.setflags(write=False)
    return stacked, projector

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
