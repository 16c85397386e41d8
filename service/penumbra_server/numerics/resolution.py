"""Where a found surface's residual comes from, and a better expansion centre.

* :func:`residual_between_nodes`: max |Theta| on a node set finer than the collocation nodes
  (the collocation nodes can hide truncation error);
* :func:`interpolation_floor`: how much of that residual interpolating the data explains: the
  largest difference of Theta from two interpolation orders at the same points;
* :func:`reexpanded` / :func:`recentred_surface`: the same surface written about another centre
  (rays from the new centre meet the old surface), for when the centre sits far off the middle
  and the harmonics spend themselves on the offset.

Pure functions; the geometry sources passed in may cache prepared grid nodes.
"""

from __future__ import annotations

import numpy as np

from .excision import ExcisedDataError
from .expansion import expansion_at
from .interpolation import SUPPORTED_ORDERS, GridGeometry, grid_geometry
from .rays import ray_crossings
from .slices import SliceError
from .sources import TrackedSource
from .surfaces import Surface, angular_grid, basis_on_grid, unit_vectors

__all__ = ["theta_between_nodes", "residual_between_nodes", "interpolation_floor", "reexpanded", "recentred_surface", "check_lmax"]


def check_lmax(lmax: int) -> int:
    """Degree of the finer node set used for checks between the collocation nodes."""
    return lmax + 5


def _theta_on_check_nodes(source, surface: Surface) -> np.ndarray | None:
    check = angular_grid(check_lmax(surface.lmax))
    rd = surface.derivatives(basis_on_grid(surface.lmax, check.lmax), check.theta, check.phi)
    try:
        # Evaluated once or twice per find: unprepared stencils are read from the raw arrays
        # rather than prepared node by node (grid sources; other sources take no keyword).
        points = surface.points(rd)
        geo = source(points, prepare=False) if isinstance(source, (TrackedSource, GridGeometry)) else source(points)
    except (ExcisedDataError, SliceError):
        return None
    if not geo.covered.all():
        return None
    with np.errstate(invalid="ignore", divide="ignore"):
        theta = expansion_at(rd, geo).theta
    return theta if np.all(np.isfinite(theta)) else None


def theta_between_nodes(source, surface: Surface) -> np.ndarray | None:
    """Theta (1/M) on the nodes of ``angular_grid(lmax + 5)``; None where the data does not cover
    them, they need excised data or the expansion is not finite there."""
    return _theta_on_check_nodes(source, surface)


def residual_between_nodes(source, surface: Surface, theta: np.ndarray | None = None) -> float:
    """max |Theta| (1/M) on the nodes of ``angular_grid(lmax + 5)`` (shared with the collocation
    nodes only by accident); NaN where the data does not cover them, they need excised data or
    the expansion is not finite there. ``theta``: :func:`theta_between_nodes` already made."""
    theta = _theta_on_check_nodes(source, surface) if theta is None else theta
    return float("nan") if theta is None else float(np.max(np.abs(theta)))


def interpolation_floor(source: TrackedSource, surface: Surface, order: int, main: np.ndarray | None = None) -> float:
    """Estimated max |Theta| error (1/M) from interpolating the data, on the check nodes.

    The difference of Theta from ``order`` and from ``order + 2`` (which estimates the error of
    ``order``), or from ``order - 2`` where ``order + 2`` is not supported or its wider stencils
    leave the data (an over-estimate: it measures the lower order's error). 0 for exact data,
    NaN when neither comparison can be made. ``main``: Theta at ``order`` on the check nodes
    (:func:`theta_between_nodes`), when the caller already has it.
    """
    if getattr(source, "slice_", None) is None:
        return 0.0
    main = _theta_on_check_nodes(source, surface) if main is None else main
    if main is None:
        return float("nan")
    for other in (order + 2, order - 2):
        if other not in SUPPORTED_ORDERS:
            continue
        theta = _theta_on_check_nodes(grid_geometry(source.slice_, order=other), surface)
        if theta is not None:
            return float(np.max(np.abs(theta - main)))
    return float("nan")


def reexpanded(surface: Surface, new_centre, lmax: int | None = None) -> Surface | None:
    """``surface`` written as r = h'(theta, phi) about ``new_centre`` (degree ``lmax``, default
    the surface's), by intersecting rays from the new centre with it at the collocation nodes
    and projecting. None if the new centre is not inside or a ray meets the surface more than
    once within the bracketing (not star-shaped about the new centre)."""
    lmax = surface.lmax if lmax is None else int(lmax)
    new_centre = np.asarray(new_centre, dtype=float).reshape(3)
    grid = angular_grid(lmax)
    n, _, _ = unit_vectors(grid.theta, grid.phi)
    rho = ray_crossings(surface, new_centre, n)
    if rho is None:
        return None  # the new centre is not inside, or a ray meets the surface more than once
    return Surface(new_centre, lmax, grid.project(rho))


def recentred_surface(surface: Surface, fraction: float) -> Surface | None:
    """``surface`` re-expanded about its coordinate centroid (points weighted by the flat
    coordinate area element), or None when the centroid lies within ``fraction`` of the mean radius of the
    current centre or the surface is not star-shaped about it."""
    grid = angular_grid(2 * surface.lmax)
    rd = surface.derivatives(basis_on_grid(surface.lmax, grid.lmax), grid.theta, grid.phi)
    pts = surface.points(rd)
    n, e_t, e_p = unit_vectors(grid.theta, grid.phi)
    tangent_t = rd.h_t[:, None] * n + rd.h[:, None] * e_t
    tangent_p = rd.h_p[:, None] * n + (rd.h * np.sin(grid.theta))[:, None] * e_p
    # flat area element per solid angle: |X_theta x X_phi| / sin(theta)
    weight = grid.weights * np.linalg.norm(np.cross(tangent_t, tangent_p), axis=1) / np.sin(grid.theta)
    centroid = np.sum(weight[:, None] * pts, axis=0) / np.sum(weight)
    if np.linalg.norm(centroid - surface.centre) <= fraction * surface.mean_radius:
        return None
    return reexpanded(surface, centroid)
