"""The induced 2-geometry of a star-shaped surface at chosen directions (theta, phi).

The surface x(theta, phi) = c + h n is embedded in the slice (gamma_ij); with the coordinate
tangents X_A = d_A x (A = theta, phi) it carries

    q_AB = gamma_ij X_A^i X_B^j,
    Gamma_CAB = gamma_ij X_C^i (d_A X_B^j + 3Gamma^j_kl X_A^k X_B^l)   (first kind),

the second being the tangential part of the 3-D covariant derivative of X_B along X_A, so only
first derivatives of gamma_ij are needed. The chart (theta, phi) is singular at the poles; the
directions handed in must avoid them (Gauss-Legendre nodes do).

Everything here is algebra at points: no interpolation, no state.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .geometry import PointGeometry
# product_grid_basis re-exported: the measurements import it from here.
from .harmonics import expand_on_product
from .surfaces import (HarmonicBasis, RadiusDerivatives, Surface, harmonic_basis, product_grid_basis,  # noqa: F401
                       unit_vectors)

__all__ = ["InducedGeometry", "induced_geometry", "product_grid_basis", "surface_on_product"]


@dataclass(frozen=True, eq=False)
class InducedGeometry:
    """Induced geometry at N surface points (lengths in M).

    Attributes:
        theta, phi: (N,) the chart directions (radians).
        points: (N, 3) coordinate positions.
        tangents: (N, 2, 3) X_A^i, A = 0 (theta), 1 (phi).
        metric: (N, 2, 2) q_AB.
        inverse_metric: (N, 2, 2) q^AB.
        sqrt_det: (N,) sqrt(det q), so dA = sqrt_det dtheta dphi.
        christoffel: (N, 2, 2, 2) Gamma^C_AB, [n, C, A, B].
        normal_up: (N, 3) outward unit normal s^i in the slice.
        geometry: the slice geometry at ``points``.
    """

    theta: np.ndarray
    phi: np.ndarray
    points: np.ndarray
    tangents: np.ndarray
    metric: np.ndarray
    inverse_metric: np.ndarray
    sqrt_det: np.ndarray
    christoffel: np.ndarray
    normal_up: np.ndarray
    geometry: PointGeometry


def surface_on_product(surface: Surface, theta_values: np.ndarray, phi_values: np.ndarray) -> RadiusDerivatives:
    """h and its derivatives at the product grid theta_values x phi_values (theta-major), summed
    over the grid's 1-D factors (:func:`~.harmonics.expand_on_product`)."""
    th = np.asarray(theta_values, dtype=float).ravel()
    ph = np.asarray(phi_values, dtype=float).ravel()
    values = expand_on_product(surface.lmax, th, ph, surface.coefficients)
    return RadiusDerivatives(np.repeat(th, ph.size), np.tile(ph, th.size), *values)


def induced_geometry(
    surface: Surface, theta: np.ndarray, phi: np.ndarray, geometry_source, *, basis: HarmonicBasis | None = None,
    derivatives: RadiusDerivatives | None = None,
) -> InducedGeometry:
    """Induced metric, its Christoffel symbols and the unit normal at directions (theta, phi).

    ``geometry_source`` maps (N, 3) points to :class:`PointGeometry`; a ValueError names the
    points it does not cover. ``basis``: the surface's harmonic basis at the directions, or
    ``derivatives``: h and its derivatives there (e.g. :func:`surface_on_product`), if already
    at hand.
    """
    theta = np.asarray(theta, dtype=float).ravel()
    phi = np.asarray(phi, dtype=float).ravel()
    if derivatives is not None:
        rd = derivatives
    else:
        rd = surface.derivatives(harmonic_basis(surface.lmax, theta, phi) if basis is None else basis, theta, phi)
    n, et, ep = unit_vectors(theta, phi)
    st, ct = np.sin(theta)[:, None], np.cos(theta)[:, None]
    h, ht, hp = rd.h[:, None], rd.h_t[:, None], rd.h_p[:, None]
    X_t = ht * n + h * et
    X_p = hp * n + h * st * ep
    # d_theta n = e_theta, d_phi n = sin e_phi, d_theta e_theta = -n, d_phi e_theta = cos e_phi,
    # d_theta e_phi = 0, d_phi e_phi = -(sin n + cos e_theta).
    X_tt = rd.h_tt[:, None] * n + 2 * ht * et - h * n
    X_tp = rd.h_tp[:, None] * n + ht * st * ep + hp * et + h * ct * ep
    X_pp = rd.h_pp[:, None] * n + 2 * hp * st * ep - h * st * (st * n + ct * et)
    points = surface.points(rd)
    geo = geometry_source(points)
    if not geo.covered.all():
        raise ValueError(
            f"surface: {int((~geo.covered).sum())} of {geo.covered.size} points lie outside the data; cannot measure"
        )
    g, dg = geo.gamma, geo.dgamma
    X = np.stack([X_t, X_p], axis=1)  # (N, 2, 3)
    XX = np.stack([np.stack([X_tt, X_tp], axis=1), np.stack([X_tp, X_pp], axis=1)], axis=1)  # (N, 2, 2, 3)
    q = np.einsum("nai,nij,nbj->nab", X, g, X)
    det = q[:, 0, 0] * q[:, 1, 1] - q[:, 0, 1] ** 2
    qinv = np.stack([np.stack([q[:, 1, 1], -q[:, 0, 1]], -1), np.stack([-q[:, 0, 1], q[:, 0, 0]], -1)], 1)
    qinv /= det[:, None, None]
    # 3-D Christoffel symbols of the first kind [n, i, j, k] = Gamma_ijk.
    chris3 = 0.5 * (dg.transpose(0, 2, 1, 3) + dg.transpose(0, 2, 3, 1) - dg)
    accel = np.einsum("nij,nabj->nabi", g, XX) + np.einsum("nijk,naj,nbk->nabi", chris3, X, X)
    first_kind = np.einsum("nci,nabi->ncab", X, accel)
    christoffel = np.einsum("ncd,ndab->ncab", qinv, first_kind)
    # The covector normal to both tangents is their flat cross product (outward: X_t x X_p has
    # radial part h^2 sin theta > 0); raise and normalise with gamma.
    s_low = np.cross(X_t, X_p)
    ginv = np.linalg.inv(g)
    s_up = np.einsum("nij,nj->ni", ginv, s_low)
    s_up /= np.sqrt(np.einsum("ni,ni->n", s_up, s_low))[:, None]
    return InducedGeometry(theta, phi, points, X, q, qinv, np.sqrt(det), christoffel, s_up, geo)
