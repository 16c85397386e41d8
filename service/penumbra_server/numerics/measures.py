"""Quantities of a found surface: area, irreducible mass, centroid, radii, circumferences and a
surface-resolution indicator.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .excision import ExcisedDataError
from .expansion import level_set_derivatives
from .interpolation import DEFAULT_ORDER
from .rays import ray_crossings
from .sources import TrackedSource, as_tracked_source
from .surfaces import Surface, angular_grid, basis_on_grid, unit_vectors

__all__ = ["SurfaceQuantities", "measure_surface", "surface_area", "plane_cut", "plane_cut_spanned", "proper_length_closed"]


@dataclass(frozen=True)
class SurfaceQuantities:
    """Measurements of one closed surface (lengths in M, areas in M^2).

    Attributes:
        area: proper area A.
        irreducible_mass: sqrt(A / 16 pi).
        centroid: (3,) area-weighted mean of the coordinate positions.
        radius_min, radius_mean, radius_max: coordinate radius h about the surface centre
            (mean over solid angle; min and max sampled on a grid twice as fine as the nodes).
        circumference_xy, circumference_xz, circumference_yz: proper lengths of the cuts of the
            surface with the coordinate planes through the centroid (NaN if a cut is not
            star-shaped about the centroid or leaves the data).
        resolution_indicator: energy in the top harmonic degree over the total; small (say
            < 1e-8) means l_max resolves the shape.
        angular_momentum: (3,) J_k = (1/8 pi) closed-integral K_ij phi_k^i s^j dA with phi_k the
            coordinate rotation about axis k through the centroid (M^2). Exact when phi_k is a
            Killing field of the horizon (Kerr in Kerr-Schild or Boyer-Lindquist-like
            coordinates); an estimate otherwise (approximate-Killing-vector spin is the more
            general method: Dreyer, Krishnan, Shoemaker & Schnetter, PRD 67, 024018 (2003)).
        christodoulou_mass: sqrt(M_irr^2 + |J|^2 / (4 M_irr^2)) (Christodoulou, PRL 25, 1596
            (1970)), with J from ``angular_momentum``.
    """

    area: float
    irreducible_mass: float
    centroid: np.ndarray
    radius_min: float
    radius_mean: float
    radius_max: float
    circumference_xy: float
    circumference_xz: float
    circumference_yz: float
    resolution_indicator: float
    angular_momentum: np.ndarray
    christodoulou_mass: float


def _area_density(surface: Surface, theta, phi, basis, geometry_source):
    """(sqrt(det q) / sin(theta) at the directions, surface points, geometry there, radius
    derivatives): the area element per solid angle, so area = sum(weights * density)."""
    rd = surface.derivatives(basis, theta, phi)
    n, et, ep = unit_vectors(theta, phi)
    st = np.sin(theta)
    X_t = rd.h_t[:, None] * n + rd.h[:, None] * et
    X_p = rd.h_p[:, None] * n + (rd.h * st)[:, None] * ep
    pts = surface.points(rd)
    geo = geometry_source(pts)
    if not geo.covered.all():
        raise ValueError(
            f"surface: {int((~geo.covered).sum())} of {geo.covered.size} points lie outside the data; cannot measure"
        )
    g = geo.gamma
    q_tt = np.einsum("ni,nij,nj->n", X_t, g, X_t)
    q_tp = np.einsum("ni,nij,nj->n", X_t, g, X_p)
    q_pp = np.einsum("ni,nij,nj->n", X_p, g, X_p)
    return np.sqrt(q_tt * q_pp - q_tp**2) / st, pts, geo, rd


def _angular_momentum(weights, density, points, geo, rd, centroid) -> np.ndarray:
    """(3,) (1/8 pi) closed-integral K_ij phi_k^i s^j dA for the rotations about the centroid."""
    dF = level_set_derivatives(rd).dF
    ginv = np.linalg.inv(geo.gamma)
    up = np.einsum("nij,nj->ni", ginv, dF)
    s_up = up / np.sqrt(np.einsum("ni,ni->n", up, dF))[:, None]
    K_s = np.einsum("nij,nj->ni", geo.K, s_up)  # K_ij s^j
    rel = points - centroid
    # phi_k^i = epsilon_{k l i} rel^l, so K_ij phi_k^i s^j = (rel x K s)_k
    return np.sum((weights * density)[:, None] * np.cross(rel, K_s), axis=0) / (8 * np.pi)


def surface_area(surface: Surface, data, *, order: int = DEFAULT_ORDER) -> float:
    """Proper area (M^2) by the node quadrature of ``angular_grid(2 lmax)``."""
    source = as_tracked_source(data, order=order)
    grid = angular_grid(2 * surface.lmax)
    dens = _area_density(surface, grid.theta, grid.phi, basis_on_grid(surface.lmax, grid.lmax), source)[0]
    return float(np.sum(grid.weights * dens))


def plane_cut(surface: Surface, origin: np.ndarray, normal_axis: int, samples: int = 128) -> np.ndarray | None:
    """(samples, 3) points where the surface meets the coordinate plane through ``origin`` with
    normal along axis ``normal_axis`` (0, 1, 2), at uniform in-plane angles about ``origin``.

    None when a ray from ``origin`` does not meet the surface once (cut not star-shaped about it).
    """
    a1, a2 = [a for a in range(3) if a != normal_axis]
    return plane_cut_spanned(surface, origin, np.eye(3)[a1], np.eye(3)[a2], samples)


def plane_cut_spanned(surface: Surface, origin: np.ndarray, e1: np.ndarray, e2: np.ndarray, samples: int = 128) -> np.ndarray | None:
    """(samples, 3) points where the surface meets the plane through ``origin`` spanned by the
    orthonormal coordinate vectors ``e1``, ``e2``, at in-plane angles psi = 2 pi k / samples
    from e1 towards e2 about ``origin``. None as for :func:`plane_cut`."""
    psi = 2 * np.pi * np.arange(samples) / samples
    d = np.cos(psi)[:, None] * np.asarray(e1, dtype=float) + np.sin(psi)[:, None] * np.asarray(e2, dtype=float)
    rho = ray_crossings(surface, origin, d)
    if rho is None:
        return None
    return origin + rho[:, None] * d


def proper_length_closed(points: np.ndarray, geometry_source) -> float:
    """Proper length of a closed curve sampled at uniform parameter (M), spectrally: the tangent
    comes from FFT differentiation and the periodic trapezoid rule integrates."""
    n = points.shape[0]
    k = np.fft.fftfreq(n, d=1.0 / n)
    if n % 2 == 0:
        k[n // 2] = 0.0  # the Nyquist mode has no odd derivative
    tangent = np.real(np.fft.ifft(1j * k[:, None] * np.fft.fft(points, axis=0), axis=0))
    try:
        geo = geometry_source(points)
    except ExcisedDataError:
        return float("nan")  # the cut passes where the data are excised, as off the data
    if not geo.covered.all():
        return float("nan")
    speed = np.sqrt(np.einsum("ni,nij,nj->n", tangent, geo.gamma, tangent))
    return float(np.sum(speed) * 2 * np.pi / n)


def measure_surface(surface: Surface, data, *, order: int = DEFAULT_ORDER, cut_samples: int = 128) -> SurfaceQuantities:
    """Measure ``surface`` in ``data``: a Slice, a reference spacetime, a geometry source, or the
    ``geometry`` of the :class:`~.finder.FindResult` that found it (its prepared grid nodes are
    reused, so measuring costs little beyond the new points' stencils).

    Quadratures use ``angular_grid(2 lmax)`` (exact for the products that appear when the
    metric is smooth), so the area converges with the surface, not with the node count.
    """
    source: TrackedSource = as_tracked_source(data, order=order)
    grid = angular_grid(2 * surface.lmax)
    basis = basis_on_grid(surface.lmax, grid.lmax)
    dens, pts, geo, rd = _area_density(surface, grid.theta, grid.phi, basis, source)
    area = float(np.sum(grid.weights * dens))
    centroid = np.sum((grid.weights * dens)[:, None] * pts, axis=0) / area
    spin = _angular_momentum(grid.weights, dens, pts, geo, rd, centroid)
    m_irr = float(np.sqrt(area / (16 * np.pi)))
    h = basis.Y @ surface.coefficients
    circ = []
    for axis in (2, 1, 0):  # xy, xz, yz planes
        cut = plane_cut(surface, centroid, axis, cut_samples)
        circ.append(float("nan") if cut is None else proper_length_closed(cut, source))
    return SurfaceQuantities(
        area=area,
        irreducible_mass=m_irr,
        centroid=centroid,
        radius_min=float(h.min()),
        radius_mean=surface.mean_radius,
        radius_max=float(h.max()),
        circumference_xy=circ[0],
        circumference_xz=circ[1],
        circumference_yz=circ[2],
        resolution_indicator=surface.top_degree_fraction(),
        angular_momentum=spin,
        christodoulou_mass=float(np.sqrt(m_irr**2 + float(spin @ spin) / (4 * m_irr**2))),
    )
