"""The MOTS stability operator on a surface in the displacement representation (:mod:`.displaced`).

The same operator and weak form as :mod:`.stability` (Andersson, Mars & Simon, PRL 95, 111102
(2005); from memory; conventions and derivation there), with the geometry of the surface taken
from its parametrisation instead of a radius function: tangents e_A = d_A x, outward unit
normal s_i proportional to eps_ijk e_theta^j e_phi^k, k_AB = -s_j (d_A d_B x^j + Gamma^j_ik e_A^i
e_B^k), chi_AB = k_AB - K_AB, R_S from the Gauss equation, Omega_A = -K_ij s^i e_A^j. psi is
expanded in the real harmonics of the parameter sphere; the Galerkin matrices use the area
element dA = sqrt(det q) d theta d phi. This is what a MOTS that is not star-shaped needs, and
it avoids refitting a pinched surface about a centre.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg

from .curvature import christoffel_lower, spatial_ricci
from .displaced import DisplacedSurface, embedding_on_product_grid
from .sources import as_tracked_source
from .stability import StabilitySpectrum, galerkin_blocks
from .surfaces import angular_grid

__all__ = ["displaced_stability_spectra", "displaced_stability_spectrum"]


def _matrices(surface: DisplacedSurface, data, lmax: int, order: int):
    n_theta = 2 * max(lmax, surface.grid_lmax()) + 6
    grid = angular_grid(lmax, n_theta, 2 * n_theta)
    theta, w = grid.theta, grid.weights
    source = as_tracked_source(data, order=order)
    emb = embedding_on_product_grid(surface, grid)
    geo = source(emb.x)
    if not geo.covered.all():
        raise ValueError(f"surface: {int((~geo.covered).sum())} of {theta.size} quadrature points lie outside the data")
    size = float(np.mean(np.linalg.norm(emb.x - emb.x.mean(axis=0), axis=1)))
    curv = spatial_ricci(emb.x, geo, source, 1e-4 * size)
    g, K = geo.gamma, geo.K
    ginv = np.linalg.inv(g)
    X = np.stack([emb.x_t, emb.x_p], axis=1)  # (N, 2, 3) tangents
    s_low = np.cross(emb.x_t, emb.x_p)
    s_up = np.einsum("nij,nj->ni", ginv, s_low)
    norm = np.sqrt(np.einsum("ni,ni->n", s_low, s_up))
    s_low, s_up = s_low / norm[:, None], s_up / norm[:, None]
    q2 = np.einsum("nAi,nij,nBj->nAB", X, g, X)
    q2_inv = np.linalg.inv(q2)
    second = np.stack([np.stack([emb.x_tt, emb.x_tp], 1), np.stack([emb.x_tp, emb.x_pp], 1)], 1)
    s_gamma = np.einsum("nl,nlik->nik", s_up, christoffel_lower(geo.dgamma))
    k_AB = -(np.einsum("nj,nABj->nAB", s_low, second) + np.einsum("nik,nAi,nBk->nAB", s_gamma, X, X))
    K_AB = np.einsum("nAi,nij,nBj->nAB", X, K, X)
    chi = k_AB - K_AB

    def square(t):
        return np.einsum("nAB,nCD,nAC,nBD->n", t, t, q2_inv, q2_inv)

    H = np.einsum("nAB,nAB->n", q2_inv, k_AB)
    trace_K = np.einsum("nij,nij->n", ginv, K)
    expansion = H - trace_K + np.einsum("nij,ni,nj->n", K, s_up, s_up)
    scalar_2d = curv.scalar - 2.0 * np.einsum("nij,ni,nj->n", curv.ricci, s_up, s_up) + H**2 - square(k_AB)
    omega_low = -np.einsum("nij,ni,nAj->nA", K, s_up, X)  # Omega_A
    omega_up = np.einsum("nAB,nB->nA", q2_inv, omega_low)
    omega_sq = np.einsum("nA,nA->n", omega_up, omega_low)
    density = np.sqrt(np.linalg.det(q2)) / np.sin(theta)  # dA per solid angle of the parameter sphere
    wd = w * density
    stiffness, drift, potential = galerkin_blocks(grid.basis, wd, q2_inv, omega_up)
    operator = stiffness + drift - drift.T + potential(0.5 * scalar_2d - 0.5 * square(chi) - omega_sq)
    symmetrized = stiffness + potential(0.5 * scalar_2d - 0.5 * square(chi))
    return operator, potential(np.ones_like(theta)), symmetrized, expansion, float(np.sum(wd))


def displaced_stability_spectrum(surface: DisplacedSurface, data, *, lmax: int | None = None, count: int = 6,
                                 order: int = 4) -> StabilitySpectrum:
    """Principal eigenvalue (1/M^2) and low spectrum of the stability operator (vacuum) of a
    surface in the displacement representation; psi up to degree ``lmax`` (default the
    surface's). Same result type and conventions as :func:`.stability.stability_spectrum`."""
    lmax = surface.lmax if lmax is None else int(lmax)
    if lmax < 1:
        raise ValueError(f"lmax: expected an integer >= 1, got {lmax}")
    return _spectrum(*_matrices(surface, data, lmax, order), lmax, count)


def displaced_stability_spectra(surface: DisplacedSurface, data, degrees, *, count: int = 6,
                                order: int = 4) -> list[StabilitySpectrum]:
    """:func:`displaced_stability_spectrum` for psi up to each of ``degrees`` on one quadrature
    (that of the highest): the Galerkin matrices of a lower degree are the leading blocks of the
    highest's (the same harmonics at the same nodes), so the geometry is interpolated and the
    matrices are made once."""
    degrees = [int(d) for d in degrees]
    if not degrees or min(degrees) < 1:
        raise ValueError(f"degrees: expected integers >= 1, got {degrees}")
    top = max(degrees)
    operator, mass, symmetrized, expansion, area = _matrices(surface, data, top, order)
    out = []
    for degree in degrees:
        k = (degree + 1) ** 2
        out.append(_spectrum(operator[:k, :k], mass[:k, :k], symmetrized[:k, :k], expansion, area, degree, count))
    return out


def _spectrum(operator, mass, symmetrized, expansion, area, lmax: int, count: int) -> StabilitySpectrum:
    values, vectors = scipy.linalg.eig(operator, mass)
    ordering = np.argsort(values.real)
    values, vectors = values[ordering], vectors[:, ordering]
    principal = np.real(vectors[:, 0] * np.exp(-1j * np.angle(vectors[np.argmax(np.abs(vectors[:, 0])), 0])))
    principal *= np.sqrt(area / float(principal @ mass @ principal)) * (1.0 if principal[0] >= 0 else -1.0)
    lowest = scipy.linalg.eigh(symmetrized, mass, eigvals_only=True, subset_by_index=[0, 0])
    return StabilitySpectrum(
        principal_eigenvalue=float(values[0].real), principal_imaginary=float(values[0].imag),
        eigenvalues=values[:count], eigenfunction=principal, symmetrized_eigenvalue=float(lowest[0]),
        max_abs_expansion=float(np.max(np.abs(expansion))), area=area, lmax=lmax)
