"""Spin of a horizon from its approximate Killing vector (AKV).

The rotational symmetry of a horizon is sought among divergence-free fields on the surface S,
phi^a = epsilon^ab D_b z, with z expanded in real spherical harmonics of the chart (theta, phi)
up to a degree ``lmax`` (l >= 1: constants give phi = 0). The Killing residual
D_a phi_b + D_b phi_a = epsilon_b^c H_ac + epsilon_a^c H_bc (H = D_a D_b z) has norm
4 |H^TF|^2, so we minimise

    A[z] = closed-integral H^TF_ab H^TF^ab dA   over   B[z] = closed-integral D_a z D^a z dA,

a generalised symmetric eigenproblem A c = lambda B c (scipy.linalg.eigh). This is the
variational problem of Cook & Whiting, PRD 76, 041501 (2007), and of Owen, PRD 80, 084012
(2009), in the pointwise form that needs only first derivatives of the metric (integrating by
parts gives their 2 closed-integral [(Delta z)^2 - R |D z|^2] dA = 4 A[z]; citations and
equivalence from memory). lambda = 0 exactly for a Killing field; we report lambda R^2
(dimensionless, R the areal radius); on a round sphere the l = 1 triplet has 0 and the next
modes (l = 2) have 2.

Normalisation (our choice, following the integral normalisation of Cook & Whiting 2007 from
memory): closed-integral (z - zbar)^2 dA = 4 pi R^6 / 3. For an exact rotational Killing field
this is the same as asking that its orbits have affine period 2 pi (Dreyer, Krishnan,
Shoemaker & Schnetter, PRD 67, 024018 (2003)): the period of the orbit z = c is dA(z < c)/dc,
so period 2 pi makes z - zbar uniformly distributed over [-A/4pi, A/4pi] in area, whose second
moment is 4 pi R^6 / 3. The invariant coordinate zeta = (z - zbar) / R^2 then spans [-1, 1]
(Ashtekar, Engle, Pawlowski & Van Den Broeck, CQG 21, 2549 (2004)).

Spin: J = (1/8 pi) closed-integral K_ij phi^i s^j dA, phi^i = X_A^i phi^A the push-forward, the
sign with K = -nabla_mu n^mu giving J = a M for Kerr. Near-round surfaces have three
near-degenerate lowest modes; then the rotation whose axis is the spin direction is picked from
their span (see :func:`horizon_spin`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import eigh

from .intrinsic import InducedGeometry, induced_geometry, product_grid_basis, surface_on_product
from .sources import TrackedSource, as_tracked_source
from .surfaces import HarmonicBasis, Surface, angular_grid, harmonic_basis

__all__ = ["HorizonSpin", "horizon_spin", "PotentialTerms", "potential_terms", "SurfaceQuadrature", "surface_quadrature"]

#: The lowest modes kept from the eigenproblem (the l = 1 triplet and the next one).
_MODES = 4


@dataclass(frozen=True, eq=False)
class HorizonSpin:
    """Spin of a closed surface from its approximate Killing vector.

    Attributes:
        angular_momentum: J >= 0 (M^2), the spin about ``direction``.
        direction: (3,) unit coordinate vector along which the spin points: the area-weighted
            coordinate dipole of zeta, oriented so that J >= 0 (meaningless when J ~ 0).
        spin_vector: (3,) J * direction (M^2).
        area: proper area (M^2); areal_radius R = sqrt(A / 4 pi) (M).
        irreducible_mass: sqrt(A / 16 pi) (M).
        christodoulou_mass: sqrt(M_irr^2 + J^2 / (4 M_irr^2)) (M) (Christodoulou, PRL 25, 1596
            (1970)).
        dimensionless_spin: chi = J / M_chr^2.
        killing_eigenvalues: (4,) the lowest lambda R^2 (dimensionless); the first is the
            AKV's departure from a true Killing field (0 for one; round sphere's l = 2 modes: 2).
        degenerate: True when the lowest two eigenvalues differed by less than the degeneracy
            tolerance and the AKV was chosen within the lowest three modes.
        centroid: (3,) area-weighted mean coordinate position (M).
        zeta_lmax: degree of the potential's expansion.
        zeta_coefficients: ((zeta_lmax + 1)^2,) real-harmonic coefficients (chart of the
            surface, l = 0 included) of the invariant coordinate zeta = (z - zbar) / R^2, with
            the AKV phi^a = R^2 epsilon^ab D_b zeta (dimensionless).
    """

    angular_momentum: float
    direction: np.ndarray
    spin_vector: np.ndarray
    area: float
    areal_radius: float
    irreducible_mass: float
    christodoulou_mass: float
    dimensionless_spin: float
    killing_eigenvalues: np.ndarray
    degenerate: bool
    centroid: np.ndarray
    zeta_lmax: int
    zeta_coefficients: np.ndarray


@dataclass(frozen=True, eq=False)
class SurfaceQuadrature:
    """Induced geometry, the potential's harmonic basis and area weights at quadrature nodes:
    closed-integral f dA = sum(dA * f) for f given at the nodes."""

    induced: InducedGeometry
    basis: HarmonicBasis
    weights: np.ndarray
    dA: np.ndarray
    sin_theta: np.ndarray

    @property
    def area(self) -> float:
        return float(np.sum(self.dA))


def surface_quadrature(surface: Surface, data, lmax_zeta: int, n_theta: int | None = None) -> SurfaceQuadrature:
    """Gauss-Legendre (cos theta) x uniform phi nodes, n_phi = 2 n_theta, on ``surface`` in
    ``data`` (a Slice, a reference spacetime or a geometry source). Default n_theta: for
    products of two degree-``lmax_zeta`` fields with the (smooth) metric, about twice the larger
    degree, as measures.py uses for the area."""
    source = data if isinstance(data, TrackedSource) else as_tracked_source(data)
    n_theta = int(n_theta or 2 * max(surface.lmax, lmax_zeta) + 2)
    grid = angular_grid(1, n_theta, 2 * n_theta)  # nodes and weights only (basis of degree 1)
    th, ph = grid.theta[:: grid.n_phi], grid.phi[: grid.n_phi]
    induced = induced_geometry(surface, grid.theta, grid.phi, source, derivatives=surface_on_product(surface, th, ph))
    st = np.sin(grid.theta)
    basis = product_grid_basis(lmax_zeta, th, ph)
    return SurfaceQuadrature(induced, basis, grid.weights, grid.weights * induced.sqrt_det / st, st)


def _frame(q: np.ndarray) -> np.ndarray:
    """(N, 2, 2) E with columns an orthonormal frame of q: E^T q E = 1 (e1 along d_theta)."""
    a, b, c = q[:, 0, 0], q[:, 0, 1], q[:, 1, 1]
    det = a * c - b * b
    E = np.zeros_like(q)
    E[:, 0, 0] = 1 / np.sqrt(a)
    E[:, 0, 1] = -b / np.sqrt(a * det)
    E[:, 1, 1] = a / np.sqrt(a * det)
    return E


def _quadratic_forms(quad: SurfaceQuadrature) -> tuple[np.ndarray, np.ndarray]:
    """(A, B) over the harmonics 1 <= l <= lmax_zeta (index 0 dropped)."""
    ind, basis = quad.induced, quad.basis
    g_t, g_p = basis.d_theta[:, 1:], basis.d_phi[:, 1:]
    gam = ind.christoffel[:, :, :, :, None]  # [n, C, A, B]
    # H_AB = d_A d_B z - Gamma^C_AB d_C z, written out (large einsums are slow here).
    h_tt = basis.d_theta_theta[:, 1:] - gam[:, 0, 0, 0] * g_t - gam[:, 1, 0, 0] * g_p
    h_tp = basis.d_theta_phi[:, 1:] - gam[:, 0, 0, 1] * g_t - gam[:, 1, 0, 1] * g_p
    h_pp = basis.d_phi_phi[:, 1:] - gam[:, 0, 1, 1] * g_t - gam[:, 1, 1, 1] * g_p
    E = _frame(ind.metric)
    e00, e01, e11 = (E[:, i, j, None] for i, j in ((0, 0), (0, 1), (1, 1)))
    # Frame components E^T H E and E^T grad (E is upper triangular).
    hat00 = e00 * e00 * h_tt
    hat01 = e00 * (e01 * h_tt + e11 * h_tp)
    hat11 = e01 * e01 * h_tt + 2 * e01 * e11 * h_tp + e11 * e11 * h_pp
    w = quad.dA[:, None]
    A = np.zeros((g_t.shape[1],) * 2)
    B = np.zeros_like(A)
    for u in ((hat00 - hat11) / np.sqrt(2), np.sqrt(2) * hat01):  # |H^TF|^2 = u1^2 + u2^2
        A += (w * u).T @ u
    for u in (e00 * g_t, e01 * g_t + e11 * g_p):
        B += (w * u).T @ u
    return 0.5 * (A + A.T), 0.5 * (B + B.T)


@dataclass(frozen=True, eq=False)
class PotentialTerms:
    """zeta (N,) at quadrature nodes and the rotation density (N,): K_ij s^i phi^j sqrt(det q)
    / (R^2 sin theta), so that closed-integral f K_ij s^i phi^j dA = R^2 sum(weights * f * density)."""

    zeta: np.ndarray
    rotation_density: np.ndarray


def potential_terms(quad: SurfaceQuadrature, coefficients: np.ndarray) -> PotentialTerms:
    """zeta and the density of K(s, phi) for the potential with these harmonic coefficients."""
    ind, basis = quad.induced, quad.basis
    zeta = basis.Y @ coefficients
    z_t, z_p = basis.d_theta @ coefficients, basis.d_phi @ coefficients
    # sqrt(q) phi^A = R^2 (d_phi zeta, -d_theta zeta): epsilon^{theta phi} = +1/sqrt(q) for the
    # outward orientation (X_theta, X_phi, s right-handed).
    X = ind.tangents
    phi_density = X[:, 0] * z_p[:, None] - X[:, 1] * z_t[:, None]
    k_phi_s = np.einsum("ni,nij,nj->n", phi_density, ind.geometry.K, ind.normal_up)
    return PotentialTerms(zeta, k_phi_s / quad.sin_theta)


def _normalised(coefs_z: np.ndarray, basis_Y: np.ndarray, dA: np.ndarray, area: float) -> np.ndarray:
    """Coefficients (with l = 0) of zeta = (z - zbar)/R^2, scaled so that closed-integral zeta^2 dA = A/3."""
    full = np.concatenate([[0.0], coefs_z])
    z = basis_Y @ full
    zbar = float(np.sum(dA * z)) / area
    full[0] = -zbar * np.sqrt(4 * np.pi)  # Y_00 = 1 / sqrt(4 pi)
    second_moment = float(np.sum(dA * (z - zbar) ** 2))
    return full * np.sqrt(area / 3 / second_moment)


def horizon_spin(
    surface: Surface,
    data,
    *,
    lmax: int | None = None,
    degeneracy_tolerance: float = 1e-6,
    order: int = 4,
) -> HorizonSpin:
    """Spin of ``surface`` in ``data`` (a Slice, a reference spacetime or a geometry source).

    Args:
        lmax: degree of the potential z (default: the surface's l_max).
        degeneracy_tolerance: if the lowest two eigenvalues lambda R^2 differ by less, the three
            lowest modes are treated as one degenerate triplet (round geometry): with J_k and unit
            dipoles d_k of each normalised mode, the spin vector is sum_k J_k d_k and the AKV is
            the combination sum_k (d_k . n) zeta_k along its direction n (exact when the d_k are
            orthonormal, as on a round sphere).
        order: interpolation order for grid data.
    """
    lz = int(surface.lmax if lmax is None else lmax)
    if lz < 1:
        raise ValueError(f"lmax: expected an integer >= 1, got {lz}")
    if not degeneracy_tolerance >= 0:
        raise ValueError(f"degeneracy_tolerance: expected a number >= 0, got {degeneracy_tolerance}")
    source = as_tracked_source(data, order=order)
    quad = surface_quadrature(surface, source, lz)
    area = quad.area
    R = float(np.sqrt(area / (4 * np.pi)))
    centroid = np.sum(quad.dA[:, None] * quad.induced.points, axis=0) / area
    A, B = _quadratic_forms(quad)
    modes = min(_MODES, A.shape[0])
    values, vectors = eigh(A, B, subset_by_index=[0, modes - 1])
    eig = values * R * R
    Y = quad.basis.Y
    rel = quad.induced.points - centroid

    def spin_and_dipole(coefficients):
        terms = potential_terms(quad, coefficients)
        J = R * R * float(np.sum(quad.weights * terms.rotation_density)) / (8 * np.pi)
        return J, np.sum((quad.dA * terms.zeta)[:, None] * rel, axis=0)

    candidates = [_normalised(vectors[:, k], Y, quad.dA, area) for k in range(min(3, modes))]
    degenerate = len(candidates) == 3 and eig[1] - eig[0] < degeneracy_tolerance
    chosen = candidates[0]
    if degenerate:
        measured = [spin_and_dipole(c) for c in candidates]
        unit = [d / np.linalg.norm(d) for _, d in measured]
        spin_vector = sum(J * d for (J, _), d in zip(measured, unit))
        if np.linalg.norm(spin_vector) > 0:
            axis = spin_vector / np.linalg.norm(spin_vector)
            combined = sum(float(d @ axis) * c for c, d in zip(candidates, unit))
            chosen = _normalised(combined[1:], Y, quad.dA, area)
    J, dipole = spin_and_dipole(chosen)
    if J < 0:
        chosen, J, dipole = -chosen, -J, -dipole
    direction = dipole / np.linalg.norm(dipole)
    m_irr = float(np.sqrt(area / (16 * np.pi)))
    m_chr = float(np.sqrt(m_irr**2 + J * J / (4 * m_irr**2)))
    spin_vector = J * direction
    for arr in (direction, spin_vector, centroid, chosen, eig):
        arr.setflags(write=False)
    return HorizonSpin(
        angular_momentum=J,
        direction=direction,
        spin_vector=spin_vector,
        area=area,
        areal_radius=R,
        irreducible_mass=m_irr,
        christodoulou_mass=m_chr,
        dimensionless_spin=J / m_chr**2,
        killing_eigenvalues=eig,
        degenerate=bool(degenerate),
        centroid=centroid,
        zeta_lmax=lz,
        zeta_coefficients=chosen,
    )
