"""One solve's book-keeping and Theta at the collocation nodes of a trial surface, for the
finder's methods (finder.py, finder_newton.py, finder_flow.py).

:func:`_evaluate` returns None with a note and a status in the solve's record when the data
cannot serve a trial surface (outside the data, excised, not finite, metric not positive
definite); the methods shorten the step on that (up to ``_MAX_SHORTENINGS`` halvings).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np

from .excision import ExcisedDataError
from .expansion import (
    ExpansionTerms,
    GeometryTerms,
    LevelSetDerivatives,
    angular_tensors,
    expansion_from,
    geometry_terms,
    level_set_derivatives,
)
from .find_results import DIVERGED, INVALID_GEOMETRY, NEEDS_EXCISED_DATA, NON_FINITE_DATA, OUTSIDE_DATA
from .geometry import PointGeometry
from .slices import DegenerateMetricError, SliceError
from .sources import TrackedSource
from .surfaces import AngularGrid, RadiusDerivatives, Surface, unit_vectors

#: Halvings of a failed trial step before the solve gives up.
_MAX_SHORTENINGS = 10


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
    level_set: LevelSetDerivatives | None = None  # d_i F, d_i d_j F at the nodes
    expansion: ExpansionTerms | None = None  # Theta's pieces (s^i, u), for the Jacobian


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
            level_set = level_set_derivatives(rd, frame, _tensors(run.grid))
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
    return _Evaluated(surface, rd, pts, geo, th, terms.u, shift, shifted, terms.normal_up, geometry_part, frame,
                      level_set, terms)


def _projected_rms(run: _Run, values: np.ndarray) -> float:
    return float(np.linalg.norm(run.grid.project(values)) / np.sqrt(4 * np.pi))

@functools.lru_cache(maxsize=16)
def _frame(grid: AngularGrid) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`unit_vectors` at the grid's nodes, read-only (memoised like :func:`_jacobian_bases`)."""
    frame = unit_vectors(grid.theta, grid.phi)
    for vectors in frame:
        vectors.setflags(write=False)
    return frame


def _diverged(surface: Surface, run: _Run, limit: float) -> bool:
    h = surface.on_grid(run.grid).h  # from the small factored tables (not the (N, n_coef) basis)
    return bool(not np.all(np.isfinite(h)) or np.min(h) <= 0 or np.max(h) > limit)


@functools.lru_cache(maxsize=16)
def _tensors(grid: AngularGrid) -> tuple[np.ndarray, np.ndarray]:
    """:func:`angular_tensors` at the grid's nodes, read-only (memoised like :func:`_frame`)."""
    tensors = angular_tensors(grid.theta, _frame(grid))
    for array in tensors:
        array.setflags(write=False)
    return tensors
