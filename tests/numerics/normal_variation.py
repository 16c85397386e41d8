"""Independent evaluation of delta_{psi s} Theta: finite differences of the expansion of
surfaces moved along their unit normal (tests only; uses nothing of the stability operator).

A radial change h -> h + eps u psi (u = |dF|) moves the surface along its normal by eps psi to
first order; the point x + eps psi s then sits at the angles shifted by -eps T^A, T the part of
u psi r_hat tangent to the surface. Comparing Theta of the moved surface there with Theta at the
original point is the variation following the points (central difference, error O(eps^2)).
"""

from __future__ import annotations

import numpy as np

from penumbra_server.numerics.expansion import expansion_at
from penumbra_server.numerics.surfaces import Surface, angular_grid, harmonic_basis, unit_vectors


def _expansion_at_angles(surface, data, theta, phi):
    rd = surface.at(theta, phi)
    return expansion_at(rd, data.geometry(surface.points(rd)))


def _tangents(rd, theta, phi):
    """(N, 2, 3) coordinate tangents d x / d theta and d x / d phi of the surface."""
    n, et, ep = unit_vectors(theta, phi)
    x_t = rd.h_t[:, None] * n + rd.h[:, None] * et
    x_p = rd.h_p[:, None] * n + (rd.h * np.sin(theta))[:, None] * ep
    return np.stack([x_t, x_p], 1)


def area_density(surface: Surface, data, theta, phi):
    """(N,) proper area per solid angle, sqrt(det q) / sin(theta), at the given angles."""
    rd = surface.at(theta, phi)
    geo = data.geometry(surface.points(rd))
    X = _tangents(rd, theta, phi)
    q = np.einsum("nAi,nij,nBj->nAB", X, geo.gamma, X)
    return np.sqrt(np.linalg.det(q)) / np.sin(theta)


def normal_variation_of_expansion(surface: Surface, data, psi_coefficients, theta, phi, *, eps=1e-5, lmax_fit=None):
    """(N,) delta_{psi s} Theta (1/M^2) at the angles (theta, phi) of ``surface``, by finite
    differences; psi = sum c_j Y_j with ``psi_coefficients`` up to any degree."""
    psi_lmax = int(round(np.sqrt(len(psi_coefficients)))) - 1
    lmax_fit = lmax_fit or max(surface.lmax, psi_lmax) + 16
    fit = angular_grid(lmax_fit)
    terms = _expansion_at_angles(surface, data, fit.theta, fit.phi)
    psi_fit = harmonic_basis(psi_lmax, fit.theta, fit.phi).Y @ psi_coefficients
    dh = Surface(surface.centre, lmax_fit, fit.project(terms.u * psi_fit))
    base = surface.with_lmax(lmax_fit)

    # tangential shift T^A = q^AB gamma(u psi r_hat, X_B) at the evaluation angles
    rd = surface.at(theta, phi)
    geo = data.geometry(surface.points(rd))
    n, et, ep = unit_vectors(theta, phi)
    X = _tangents(rd, theta, phi)
    q = np.einsum("nAi,nij,nBj->nAB", X, geo.gamma, X)
    here = _expansion_at_angles(surface, data, theta, phi)
    psi = harmonic_basis(psi_lmax, theta, phi).Y @ psi_coefficients
    radial = (here.u * psi)[:, None] * n
    T = np.linalg.solve(q, np.einsum("nBi,nij,nj->nB", X, geo.gamma, radial)[..., None])[..., 0]
    values = []
    for sign in (1.0, -1.0):
        moved = Surface(surface.centre, lmax_fit, base.coefficients + sign * eps * dh.coefficients)
        values.append(_expansion_at_angles(moved, data, theta - sign * eps * T[:, 0], phi - sign * eps * T[:, 1]).theta)
    return (values[0] - values[1]) / (2 * eps)
