"""The MOTS stability operator and its principal eigenvalue.

Conventions. Future unit normal n of the slice, outward unit normal s of the surface in the
slice, outgoing null normal l = n + s and ingoing null normal k = (n - s) / 2, so that
l . k = -1 (this fixes k once l is fixed); K_ij = -D_i n_j (K = -nabla_mu n^mu) and
Theta = D_i s^i - K + K_ij s^i s^j = q^ij (D_i s_j - K_ij) is the expansion of l.

Operator (Andersson, Mars & Simon, PRL 95, 111102 (2005); Adv. Theor. Math. Phys. 12, 853
(2008); cited from memory, re-derived here in the conventions above). Deform the surface
inside the slice with normal speed psi (points move by psi s). Then, on any surface,

    delta_{psi s} Theta = L psi - Theta (Theta / 2 + K) psi,
    L psi = -Lap psi + 2 Omega^A D_A psi + (R_S / 2 - Y - Omega_A Omega^A + D_A Omega^A) psi,

with Lap, D_A and R_S the Laplacian, connection and scalar curvature of the induced 2-metric
q_AB, Omega_A = -K_ij s^i e_A^j (equal to -k_mu nabla_A l^mu with the normalisation above) and
Y = chi_AB chi^AB / 2 + 8 pi T(l, n), chi_AB = k_AB - K_AB the second fundamental form of l
(k_AB = D_A s_B). Derivation in brief: delta H = -Lap psi - (k_AB k^AB + Ric(s, s)) psi and
delta (q^ij K_ij) = psi q^ij D_s K_ij + 2 K_sA D^A psi; the Gauss equation
R_S = R - 2 Ric(s, s) + H^2 - k_AB k^AB, the Hamiltonian constraint R = |K|^2 - K^2 + 16 pi rho
and the s-component of the momentum constraint turn q^ij D_s K_ij into D_A K_s^A + K_ss H -
K_AB k^AB (+ matter); collecting terms leaves the operator above plus the term proportional to
Theta. On a MOTS L itself is the variation. The matter term is taken as zero unless given.

Discretisation. psi is expanded in the real harmonics up to ``lmax`` of the surface's angular
coordinates. The weak form (a Galerkin method with the area element) needs neither derivatives
of K_ij nor Christoffel symbols of q_AB:

    A_ij = closed-integral [ D Y_i . D Y_j + Y_i Omega^A d_A Y_j - Y_j Omega^A d_A Y_i + V Y_i Y_j ] dA,
    M_ij = closed-integral Y_i Y_j dA,      V = R_S / 2 - chi_AB chi^AB / 2 - Omega_A Omega^A - 8 pi T(l, n),

(D_A Omega^A was integrated by parts) and A c = lambda M c is solved. R_S comes from the Gauss
equation with the 3-Ricci tensor of :mod:`penumbra_server.numerics.curvature`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg

from .curvature import christoffel_lower, spatial_ricci
from .expansion import level_set_derivatives
from .sources import as_tracked_source
from .intrinsic import surface_on_product
from .surfaces import Surface, angular_grid, unit_vectors

__all__ = ["StabilityMatrices", "StabilitySpectrum", "galerkin_blocks", "principal_eigenvalue", "stability_matrices",
           "stability_spectrum"]


@dataclass(frozen=True, eq=False)
class StabilityMatrices:
    """Galerkin matrices of the stability operator on one surface (harmonics up to ``lmax``).

    Attributes:
        lmax: highest harmonic degree of psi; matrices are ((lmax + 1)^2, (lmax + 1)^2).
        operator: A_ij = integral Y_i L Y_j dA (dimensionless: 1/M^2 times M^2).
        mass: M_ij = integral Y_i Y_j dA (M^2).
        symmetrized: the same for -Lap + R_S / 2 - Y (Omega dropped), whose lowest eigenvalue
            bounds L's principal eigenvalue from above (Andersson, Mars & Simon 2008, from memory;
            the bound follows from writing the positive eigenfunction as exp(v)).
        expansion_term: integral Y_i (-Theta (Theta / 2 + K)) Y_j dA, so that
            ``operator + expansion_term`` is the linearised expansion on a surface that is not a
            MOTS.
        theta: (N,) Theta (1/M) at the quadrature nodes, ``theta_nodes``/``phi_nodes`` (radians).
        area: proper area (M^2).
    """

    lmax: int
    operator: np.ndarray
    mass: np.ndarray
    symmetrized: np.ndarray
    expansion_term: np.ndarray
    theta: np.ndarray
    theta_nodes: np.ndarray
    phi_nodes: np.ndarray
    weights: np.ndarray
    area: float

    @property
    def linearised_expansion(self) -> np.ndarray:
        """Galerkin matrix of psi -> delta_{psi s} Theta (the operator of any surface)."""
        return self.operator + self.expansion_term


@dataclass(frozen=True, eq=False)
class StabilitySpectrum:
    """Low spectrum of the stability operator (eigenvalues in 1/M^2).

    Attributes:
        principal_eigenvalue: real part of the eigenvalue with the smallest real part.
        principal_imaginary: its imaginary part (zero in exact arithmetic: the principal
            eigenvalue of this non-self-adjoint operator is real; the size here is a check).
        eigenvalues: the ``count`` eigenvalues with the smallest real parts (complex, sorted).
        eigenfunction: ((lmax + 1)^2,) harmonic coefficients of the principal eigenfunction,
            normalised to integral psi^2 dA = area and positive mean (positive everywhere for a
            MOTS).
        symmetrized_eigenvalue: lowest eigenvalue of -Lap + R_S / 2 - Y (>= the principal one).
        max_abs_expansion: max |Theta| (1/M) at the quadrature nodes: the operator is the
            stability operator only where this is small (on a MOTS).
        area: proper area (M^2).
        lmax: harmonic degree of psi.
    """

    principal_eigenvalue: float
    principal_imaginary: float
    eigenvalues: np.ndarray
    eigenfunction: np.ndarray
    symmetrized_eigenvalue: float
    max_abs_expansion: float
    area: float
    lmax: int


def _tangent_vectors(rd, theta, phi):
    n, et, ep = unit_vectors(theta, phi)
    X_t = rd.h_t[:, None] * n + rd.h[:, None] * et
    X_p = rd.h_p[:, None] * n + (rd.h * np.sin(theta))[:, None] * ep
    return np.stack([X_t, X_p], axis=1)  # (N, 2, 3)


def galerkin_blocks(basis, wd: np.ndarray, q2_inv: np.ndarray, omega_up: np.ndarray):
    """The Galerkin pieces of the stability operator over the harmonics of ``basis`` at the
    quadrature nodes: the stiffness (d_A Y_i q^AB d_B Y_j), the drift (Y_i Omega^A d_A Y_j), and
    ``potential(values)``, the mass-like product of Y_i values Y_j; all summed with the weights
    ``wd`` (N,) (quadrature weight times dA per solid angle). ``q2_inv``: (N, 2, 2) inverse
    induced metric; ``omega_up``: (N, 2) Omega^A. Returns (stiffness, drift, potential)."""
    dY = np.stack([basis.d_theta, basis.d_phi], axis=1)  # (N, 2, n_coef)
    grad_Y = np.einsum("nAB,nBj->nAj", q2_inv, dY)  # raised
    # Sums over the nodes as matrix products (BLAS; einsum's own loops are several times slower).
    n_coef = dY.shape[-1]
    stiffness = (dY * wd[:, None, None]).reshape(-1, n_coef).T @ grad_Y.reshape(-1, n_coef)
    drift = (basis.Y * wd[:, None]).T @ np.einsum("nA,nAj->nj", omega_up, dY)

    def potential(values):
        return (basis.Y * (wd * values)[:, None]).T @ basis.Y

    return stiffness, drift, potential


def stability_matrices(
    surface: Surface,
    data,
    *,
    lmax: int | None = None,
    quadrature_theta: int | None = None,
    curvature_step: float | None = None,
    matter_term: np.ndarray | None = None,
    order: int = 4,
) -> StabilityMatrices:
    """Galerkin matrices of the stability operator of ``surface`` in ``data``.

    Args:
        surface: a closed star-shaped surface (for the stability operator proper, a MOTS).
        data: a Slice, a reference spacetime or a geometry source (as for the finder).
        lmax: harmonic degree of psi (default: the surface's).
        quadrature_theta: Gauss-Legendre nodes in cos(theta) (default 2 max(lmax, surface.lmax)
            + 6; phi gets twice as many): the integrands are products of two harmonics and the
            surface's geometry, so they need about twice the degree.
        curvature_step: finite-difference step (M) for the metric's second derivatives
            (default 1e-4 times the surface's mean radius).
        matter_term: optional (N,) values of 8 pi T(l, n) at the quadrature nodes (theta-major,
            as ``angular_grid`` orders them); zero (vacuum) when omitted.
        order: interpolation order for grid data.

    Raises:
        ValueError: bad sizes, or the data does not cover the surface.
    """
    lmax = surface.lmax if lmax is None else int(lmax)
    if lmax < 1:
        raise ValueError(f"lmax: expected an integer >= 1, got {lmax}")
    n_theta = int(quadrature_theta or 2 * max(lmax, surface.lmax) + 6)
    grid = angular_grid(lmax, n_theta, 2 * n_theta)
    theta, phi, w = grid.theta, grid.phi, grid.weights
    source = as_tracked_source(data, order=order)
    rd = surface_on_product(surface, theta[:: grid.n_phi], phi[: grid.n_phi])
    pts = surface.points(rd)
    geo = source(pts)
    if not geo.covered.all():
        missing = int((~geo.covered).sum())
        raise ValueError(f"surface: {missing} of {pts.shape[0]} quadrature points lie outside the data")
    step = curvature_step if curvature_step is not None else 1e-4 * surface.mean_radius
    curv = spatial_ricci(pts, geo, source, step)

    g, K = geo.gamma, geo.K
    ginv = np.linalg.inv(g)
    ls = level_set_derivatives(rd)
    F = ls.dF
    F_up = np.einsum("nij,nj->ni", ginv, F)
    u = np.sqrt(np.einsum("ni,ni->n", F_up, F))
    s_up, s_low = F_up / u[:, None], F / u[:, None]
    q_up = ginv - s_up[:, :, None] * s_up[:, None, :]  # q^ij
    proj = np.eye(3)[None] - s_up[:, :, None] * s_low[:, None, :]  # q^a_i as [n, a, i]
    # k_ij = q^a_i q^b_j D_a D_b F / u, D_a D_b F = d_a d_b F - Gamma^c_ab F_c
    hess = ls.ddF - np.einsum("nc,ncab->nab", F_up, christoffel_lower(geo.dgamma))
    k_ij = np.einsum("nai,nab,nbj->nij", proj, hess, proj) / u[:, None, None]
    K_tan = np.einsum("nai,nab,nbj->nij", proj, K, proj)
    chi = k_ij - K_tan

    def square(t):
        return np.einsum("nij,nkl,nik,njl->n", t, t, q_up, q_up)

    H = np.einsum("nij,nij->n", q_up, k_ij)
    trace_K = np.einsum("nij,nij->n", ginv, K)
    K_ss = np.einsum("nij,ni,nj->n", K, s_up, s_up)
    expansion = H - trace_K + K_ss
    ric_ss = np.einsum("nij,ni,nj->n", curv.ricci, s_up, s_up)
    scalar_2d = curv.scalar - 2.0 * ric_ss + H**2 - square(k_ij)
    omega = -np.einsum("nai,nab,nb->ni", proj, K, s_up)  # Omega_i, tangent to the surface

    X = _tangent_vectors(rd, theta, phi)
    q2 = np.einsum("nAi,nij,nBj->nAB", X, g, X)
    q2_inv = np.linalg.inv(q2)
    density = np.sqrt(np.linalg.det(q2)) / np.sin(theta)  # dA per solid angle
    omega_up = np.einsum("nAB,nBi,ni->nA", q2_inv, X, omega)  # Omega^A
    omega_sq = np.einsum("nA,nAi,ni->n", omega_up, X, omega)
    matter = np.zeros_like(theta) if matter_term is None else np.asarray(matter_term, dtype=float).ravel()
    if matter.shape != theta.shape:
        raise ValueError(f"matter_term: expected {theta.size} values (one per quadrature node), got {matter.size}")
    y_term = 0.5 * square(chi) + matter

    wd = w * density
    stiffness, drift, potential = galerkin_blocks(grid.basis, wd, q2_inv, omega_up)
    operator = stiffness + drift - drift.T + potential(0.5 * scalar_2d - y_term - omega_sq)
    return StabilityMatrices(
        lmax=lmax,
        operator=operator,
        mass=potential(np.ones_like(theta)),
        symmetrized=stiffness + potential(0.5 * scalar_2d - y_term),
        expansion_term=potential(-expansion * (0.5 * expansion + trace_K)),
        theta=expansion,
        theta_nodes=theta,
        phi_nodes=phi,
        weights=w,
        area=float(np.sum(wd)),
    )


def stability_spectrum(surface: Surface, data, *, count: int = 6, **options) -> StabilitySpectrum:
    """Principal eigenvalue (1/M^2) and low spectrum of the stability operator of ``surface``.

    ``options`` go to :func:`stability_matrices`. The principal eigenvalue is the one with the
    smallest real part; a MOTS is strictly stable when it is positive.
    """
    mats = stability_matrices(surface, data, **options)
    values, vectors = scipy.linalg.eig(mats.operator, mats.mass)
    order = np.argsort(values.real)
    values, vectors = values[order], vectors[:, order]
    principal = np.real(vectors[:, 0] * np.exp(-1j * np.angle(vectors[np.argmax(np.abs(vectors[:, 0])), 0])))
    norm = float(principal @ mats.mass @ principal)
    principal *= np.sqrt(mats.area / norm) * (1.0 if principal[0] >= 0 else -1.0)
    symmetric = scipy.linalg.eigh(mats.symmetrized, mats.mass, eigvals_only=True, subset_by_index=[0, 0])
    return StabilitySpectrum(
        principal_eigenvalue=float(values[0].real),
        principal_imaginary=float(values[0].imag),
        eigenvalues=values[:count],
        eigenfunction=principal,
        symmetrized_eigenvalue=float(symmetric[0]),
        max_abs_expansion=float(np.max(np.abs(mats.theta))),
        area=mats.area,
        lmax=mats.lmax,
    )


def principal_eigenvalue(mats: StabilityMatrices, lmax: int | None = None) -> float:
    """Principal eigenvalue (1/M^2) of ``mats`` restricted to harmonics of degree <= ``lmax``.

    The harmonics are ordered by degree (index l*l + l + m), so the Galerkin matrices of a lower
    degree on the same quadrature are the leading blocks: a truncation check costs one small
    eigenproblem, not a second evaluation of the geometry.
    """
    degree = mats.lmax if lmax is None else int(lmax)
    if not 0 <= degree <= mats.lmax:
        raise ValueError(f"lmax: expected 0 .. {mats.lmax}, got {lmax}")
    n = (degree + 1) ** 2
    values = scipy.linalg.eigvals(mats.operator[:n, :n], mats.mass[:n, :n])
    return float(np.min(values.real))
