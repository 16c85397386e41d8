"""Find a MOTS in the displacement representation (:mod:`.displaced`): Newton on the harmonic
coefficients of h, with the reference refreshed whenever |h| grows against its size.

The residual is Theta at the nodes of the parameter sphere, Galerkin-projected onto the
harmonics of h (a square system). The Jacobian is assembled from the pointwise linearisation, as
in the star-shaped finder (:mod:`.finder`): Theta at a node depends on h, its first and second
parameter derivatives there and on the fields at x_ref + h n_ref, so eight perturbed local
evaluations (h with the fields moved along n_ref; h_theta, h_phi by central differences; the
second derivatives, which enter linearly, by unit steps) give every column. Steps are halved
until the projected residual falls and the surface stays a regular, outward-oriented embedding.

Statuses and messages are those of :data:`.find_results.STATUS_MESSAGES`; not converging is a
result, not an exception.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from .displaced import (
    DisplacedSurface,
    Embedding,
    _local_values,
    combine,
    reference_on_grid,
    displacement_size,
    parametric_expansion,
    refreshed,
)
from .excision import ExcisedDataError
from .find_results import (
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
    UNRESOLVED,
)
from .finder_newton import _nodal_columns, _project_columns
from .geometry import PointGeometry
from .slices import DegenerateMetricError, SliceError
from .sources import as_tracked_source
from .surfaces import angular_grid, coefficient_count

__all__ = ["DisplacedSettings", "DisplacedFindResult", "find_displaced"]

_MAX_SHORTENINGS = 12


@dataclass(frozen=True)
class DisplacedSettings:
    """Options of :func:`find_displaced`.

    Attributes:
        tolerance: max |Theta| at the nodes to reach (1/M).
        max_iterations: Newton iterations.
        refresh_fraction: refresh the reference when max |h| exceeds this fraction of the
            reference's mean coordinate radius (our choice: small enough that n_ref stays a good
            direction, large enough that refreshing, which re-projects the positions, is rare).
        max_refreshes: cap on refreshes within one solve.
        interpolation_order: interpolation nodes per axis for grid data.
        floor_residual: when no step lowers the projected residual any more (grid data: the
            interpolation noise) and it is below this (1/M), the solve counts as converged at the
            data's floor (status 10; our choice, far below the expansion of any non-MOTS nearby).
        truncation_tolerance: a converged surface whose max |Theta| on a finer node set, times
            its mean coordinate radius, exceeds this is not resolved (status 6; the star-shaped
            finder's option of the same name has 1e-2; looser here because the reference's own
            truncation adds to it: 2.6e-2 / M x 0.44 M for the q = 2 inner MOTS at l = 12 near
            the fold, whose area agrees with the reference to 2e-6). None: no check.
    """

    tolerance: float = 1e-9
    max_iterations: int = 40
    refresh_fraction: float = 0.1
    max_refreshes: int = 20
    interpolation_order: int = 6
    floor_residual: float = 1e-5
    truncation_tolerance: float | None = 5e-2

    def __post_init__(self) -> None:
        if not self.tolerance > 0:
            raise ValueError(f"tolerance: expected a positive number, got {self.tolerance}")
        if self.max_iterations < 1:
            raise ValueError(f"max_iterations: expected an integer >= 1, got {self.max_iterations}")
        if not 0 < self.refresh_fraction < 1:
            raise ValueError(f"refresh_fraction: expected a number in (0, 1), got {self.refresh_fraction}")


@dataclass(frozen=True)
class DisplacedFindResult:
    """Outcome of :func:`find_displaced`.

    Attributes:
        surface: last iterate (the MOTS when ``success``), None if none could be evaluated.
        success: status 0 or 1.
        status, message: as in :data:`.find_results.STATUS_MESSAGES`, with specifics.
        nit: Newton iterations.
        residual_max: max |Theta| (1/M) at the nodes of the last iterate.
        projected_residual: rms of the projected Theta (1/M).
        refreshes: how many times the reference was replaced.
        geometry_evaluations: field evaluations at point sets.
        wall_time_s: seconds spent.
    """

    surface: DisplacedSurface | None
    success: bool
    status: int
    message: str
    nit: int
    residual_max: float
    projected_residual: float
    refreshes: int
    geometry_evaluations: int
    wall_time_s: float


@dataclass(frozen=True, eq=False)
class _Iterate:
    surface: DisplacedSurface
    local: tuple  # (h values, x_ref values, n_ref values) at the nodes
    geometry: PointGeometry
    shifted: object
    shift: float
    theta: np.ndarray


class _Failure(Exception):
    def __init__(self, status: int, note: str) -> None:
        super().__init__(note)
        self.status = status


class _ReferenceMemo:
    """The reference's values at the nodes for one find: its iterations keep the reference (until
    a refresh), so they are computed once per reference, not per evaluation."""

    def __init__(self) -> None:
        self._held: tuple | None = None

    def __call__(self, reference, grid_lmax: int):
        if self._held is None or self._held[0] is not reference or self._held[1] != grid_lmax:
            self._held = (reference, grid_lmax, reference_on_grid(reference, grid_lmax))
        return self._held[2]


def _evaluate(source, surface: DisplacedSurface, reference_values=None) -> _Iterate:
    grid = angular_grid(surface.grid_lmax())
    local = _local_values(surface, grid.lmax, reference_values)
    emb = combine(grid.theta, grid.phi, *local)
    if not np.all(np.isfinite(emb.x)):
        raise _Failure(DIVERGED, "surface points are not finite")
    # a regular embedding with the parametrisation's orientation: x_t x x_p along n_ref
    if np.min(np.einsum("ni,ni->n", np.cross(emb.x_t, emb.x_p), local[2][0])) <= 0:
        raise _Failure(INVALID_GEOMETRY, "the displaced surface folds over itself (the parametrisation degenerates)")
    size = float(np.mean(np.linalg.norm(emb.x - emb.x.mean(axis=0), axis=1)))
    shift = 1e-7 * size
    try:
        geo, shifted = source.evaluate(emb.x, shift * local[2][0])
    except ExcisedDataError as exc:
        raise _Failure(NEEDS_EXCISED_DATA, str(exc)) from exc
    except DegenerateMetricError as exc:
        raise _Failure(INVALID_GEOMETRY, str(exc)) from exc
    except SliceError as exc:
        raise _Failure(NON_FINITE_DATA, str(exc)) from exc
    if not geo.covered.all():
        raise _Failure(OUTSIDE_DATA, f"{int((~geo.covered).sum())} of {geo.covered.size} surface points have no data")
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        theta = parametric_expansion(emb, geo).theta
    if not np.all(np.isfinite(theta)):
        raise _Failure(INVALID_GEOMETRY, "Theta is not finite at some surface points")
    return _Iterate(surface, local, geo, shifted, shift, theta)


def _stack_embeddings(embs: list[Embedding]) -> Embedding:
    return Embedding(*(np.concatenate([getattr(e, k) for e in embs]) for k in ("theta", "phi", "x", "x_t", "x_p", "x_tt", "x_tp", "x_pp")))


def _stack_geometry(geos: list[PointGeometry]) -> PointGeometry:
    return PointGeometry(*(np.concatenate([getattr(g, k) for g in geos]) for k in ("gamma", "dgamma", "K", "covered", "source_patch")))


def _jacobian(it: _Iterate) -> np.ndarray:
    """d(projected Theta)/d(coefficients of h)."""
    surface = it.surface
    grid = angular_grid(surface.grid_lmax())
    h, xr, nr = it.local
    try:
        geo_h = it.shifted()
    except (ExcisedDataError, SliceError):
        geo_h = it.geometry
    if not geo_h.covered.all():
        geo_h = it.geometry
    scale = float(np.mean(np.linalg.norm(xr[0] - xr[0].mean(axis=0), axis=1)))
    eps1, eps2 = 1e-5 * scale, scale
    variants = [(0, it.shift), (1, eps1), (1, -eps1), (2, eps1), (2, -eps1), (3, eps2), (4, eps2), (5, eps2)]
    embs = []
    for index, eps in variants:
        values = list(h)
        values[index] = values[index] + eps
        embs.append(combine(grid.theta, grid.phi, tuple(values), xr, nr))
    geometry = _stack_geometry([geo_h] + [it.geometry] * (len(variants) - 1))
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        theta = parametric_expansion(_stack_embeddings(embs), geometry).theta.reshape(len(variants), -1)
    d = [(theta[0] - it.theta) / it.shift, (theta[1] - theta[2]) / (2 * eps1), (theta[3] - theta[4]) / (2 * eps1)]
    d += [(theta[k] - it.theta) / eps2 for k in (5, 6, 7)]
    # The nodal columns and their projection factored over the product grid, as the star-shaped
    # finder's Jacobian, for the grid's degrees, cut to the surface's (the coefficients run degree
    # by degree, so its own are the leading ones).
    count = coefficient_count(surface.lmax)
    return _project_columns(grid, _nodal_columns(grid, np.stack(d, axis=1))[:, :count])[:count]


def _projected(surface: DisplacedSurface, theta: np.ndarray) -> np.ndarray:
    grid = angular_grid(surface.grid_lmax())
    return grid.project(theta)[: coefficient_count(surface.lmax)]  # the surface's degrees lead


def _rms(surface, theta) -> float:
    return float(np.linalg.norm(_projected(surface, theta)) / np.sqrt(4 * np.pi))


def find_displaced(data, guess: DisplacedSurface, *, settings: DisplacedSettings = DisplacedSettings()) -> DisplacedFindResult:
    """Find a MOTS near ``guess`` (a :class:`DisplacedSurface`; its reference and degrees are
    kept until a refresh). ``data`` as for :func:`.finder.find_surface`."""
    start = time.perf_counter()
    source = as_tracked_source(data, order=settings.interpolation_order)
    refreshes = 0
    memo = _ReferenceMemo()
    if displacement_size(guess) > settings.refresh_fraction:
        guess, refreshes = refreshed(guess), 1
    note = ""
    try:
        it = _evaluate(source, guess, memo)
    except _Failure as exc:
        return _result(guess, exc.status, str(exc), 0, np.nan, np.nan, refreshes, source, start)
    proj = _rms(it.surface, it.theta)
    status = MAX_ITERATIONS
    nit = 0
    for nit in range(1, settings.max_iterations + 1):
        if np.max(np.abs(it.theta)) <= settings.tolerance:
            status, nit = CONVERGED, nit - 1
            break
        if proj <= settings.tolerance:
            status, nit = CONVERGED_AT_TRUNCATION, nit - 1
            break
        J = _jacobian(it)
        rhs = _projected(it.surface, it.theta)
        try:
            step = np.linalg.solve(J, -rhs)
        except np.linalg.LinAlgError:
            step = np.linalg.lstsq(J, -rhs, rcond=None)[0]
        if not np.all(np.isfinite(step)):
            status, note = INVALID_GEOMETRY, "the linearised expansion is not finite"
            break
        lam, accepted, failure = 1.0, None, (LINE_SEARCH_FAILED, "")
        for _ in range(_MAX_SHORTENINGS):
            trial = DisplacedSurface(it.surface.reference, it.surface.lmax, it.surface.coefficients + lam * step)
            try:
                cand = _evaluate(source, trial, memo)
            except _Failure as exc:
                failure = (exc.status, str(exc))
                lam *= 0.5
                continue
            cand_proj = _rms(trial, cand.theta)
            if cand_proj < (1.0 - 1e-4 * lam) * proj:
                accepted = cand
                break
            failure = (LINE_SEARCH_FAILED, "")
            if proj <= settings.floor_residual:
                break  # at the data's floor a full Newton step no longer helps: shorter ones won't
            lam *= 0.5
        if accepted is None:
            status, note = failure
            if status == LINE_SEARCH_FAILED and proj <= settings.floor_residual:
                status, note = CONVERGED_AT_INTERPOLATION_FLOOR, f"projected residual {proj:.2e} / M"
            break
        it, proj = accepted, cand_proj
        if displacement_size(it.surface) > settings.refresh_fraction and refreshes < settings.max_refreshes:
            try:
                it = _evaluate(source, refreshed(it.surface), memo)
            except _Failure as exc:
                status, note = exc.status, f"after a refresh of the reference: {exc}"
                break
            proj, refreshes = _rms(it.surface, it.theta), refreshes + 1
    else:
        if np.max(np.abs(it.theta)) <= settings.tolerance:
            status = CONVERGED
    if status == MAX_ITERATIONS and proj <= settings.tolerance:
        status = CONVERGED_AT_TRUNCATION
    between = float("nan")
    if status in (CONVERGED, CONVERGED_AT_TRUNCATION, CONVERGED_AT_INTERPOLATION_FLOOR):
        between, size = _between_nodes(source, it.surface)
        if settings.truncation_tolerance is not None and not between * size <= settings.truncation_tolerance:
            status, note = UNRESOLVED, (f"max |Theta| between the nodes {between:.2e} / M times the size "
                                        f"{size:.3g} M exceeds {settings.truncation_tolerance:g}")
    return _result(it.surface, status, note, nit, float(np.max(np.abs(it.theta))), proj, refreshes, source, start)


def _between_nodes(source, surface: DisplacedSurface) -> tuple[float, float]:
    """(max |Theta| (1/M) on a finer node set than the solve's, mean coordinate radius (M)):
    the residual the truncation of h and of the reference leaves between the nodes."""
    from .displaced import embedding

    emb = embedding(surface, surface.grid_lmax() + 4)
    size = float(np.mean(np.linalg.norm(emb.x - emb.x.mean(axis=0), axis=1)))
    geo = source(emb.x)
    if not geo.covered.all():
        return float("inf"), size
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        theta = parametric_expansion(emb, geo).theta
    return float(np.max(np.abs(theta))), size


def _result(surface, status, note, nit, residual, proj, refreshes, source, start) -> DisplacedFindResult:
    message = STATUS_MESSAGES[status] + (f": {note}" if note else "")
    message += f" (max |Theta| = {residual:.3e} / M at the nodes, {refreshes} refreshes, after {nit} iterations)"
    return DisplacedFindResult(surface, status in (CONVERGED, CONVERGED_AT_TRUNCATION, CONVERGED_AT_INTERPOLATION_FLOOR), status, message, nit,
                               residual, proj, refreshes, source.evaluations, time.perf_counter() - start)
