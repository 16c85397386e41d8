"""Mass and spin multipole moments of a horizon in the invariant coordinate of its rotation.

Definitions (Ashtekar, Engle, Pawlowski & Van Den Broeck, CQG 21, 2549 (2004); prefactors from
memory, fixed here by M_0 = M and J_1 = J, which that paper states): with the AKV
phi^a = R^2 epsilon^ab D_b zeta of :func:`penumbra_server.numerics.killing.horizon_spin`
(zeta in [-1, 1] for an exact Killing field), areal radius R, horizon mass M (Christodoulou),
scalar curvature ^2R = 2 K_G of the surface and rotation one-form omega_a = K_ij s^i e_a^j,

    M_n = (M R^n / 8 pi) closed-integral ^2R P_n(zeta) dA,
    J_n = (R^(n+1) / 8 pi) closed-integral P_n(zeta) epsilon^ab D_a omega_b dA
        = (R^(n-1) / 8 pi) closed-integral P_n'(zeta) omega_a phi^a dA     (by parts),

so M_0 = M (Gauss-Bonnet), J_0 = 0 and J_1 = J. Dimensionless versions: M_n / M^(n+1) and
J_n / M^(n+1).

The curvature integral needs only first derivatives of the metric. With the frame
e1 = d_phi / |d_phi|, e2 = grad theta / |grad theta| of the chart, the connection one-form
w_A = e2 . D_A e1 = sqrt(q) Gamma^theta_{A phi} / q_phiphi has d_theta w_phi - d_phi w_theta =
K_G sqrt(q), and the frame turns once about each chart pole, so (Stokes, the pole limits
giving -2 pi and +2 pi)

    closed-integral f K_G dA = 2 pi (f(north) + f(south))
                               - integral (d_theta f w_phi - d_phi f w_theta) dtheta dphi.

That integrand is smooth and bounded on [0, pi] x [0, 2 pi) but does not vanish at the poles,
so it is integrated with Gauss-Legendre nodes in theta itself (not cos theta) times uniform phi.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.polynomial import legendre

from .harmonics import expand_on_product
from .intrinsic import induced_geometry, surface_on_product
from .killing import HorizonSpin, horizon_spin, potential_terms, surface_quadrature
from .sources import as_tracked_source
from .surfaces import Surface, harmonic_values

__all__ = ["HorizonMultipoles", "horizon_multipoles", "curvature_moments"]


@dataclass(frozen=True, eq=False)
class HorizonMultipoles:
    """Mass and spin multipoles n = 0 .. n_max of a horizon.

    Attributes:
        mass_moments: (n_max + 1,) M_n (units M^(n+1)); M_0 = M.
        spin_moments: (n_max + 1,) J_n (units M^(n+1)); J_0 = 0, J_1 = J.
        mass_moments_dimensionless, spin_moments_dimensionless: M_n / M^(n+1), J_n / M^(n+1).
        mass: the M used (Christodoulou mass from the AKV spin), units M.
        areal_radius: R = sqrt(A / 4 pi), units M.
        spin: the :class:`HorizonSpin` whose zeta was used.
    """

    mass_moments: np.ndarray
    spin_moments: np.ndarray
    mass_moments_dimensionless: np.ndarray
    spin_moments_dimensionless: np.ndarray
    mass: float
    areal_radius: float
    spin: HorizonSpin


def _legendre(n: int, x: np.ndarray, derivative: int = 0) -> np.ndarray:
    series = legendre.Legendre.basis(n)
    return (series.deriv(derivative) if derivative else series)(x)


def curvature_moments(surface: Surface, data, zeta_lmax: int, zeta_coefficients: np.ndarray, n_max: int,
                      *, n_theta: int | None = None, order: int = 4) -> np.ndarray:
    """(n_max + 1,) closed-integral K_G P_n(zeta) dA (dimensionless) for zeta given by its
    real-harmonic coefficients of degree ``zeta_lmax`` in the surface's chart."""
    source = as_tracked_source(data, order=order)
    n_theta = int(n_theta or 2 * max(surface.lmax, zeta_lmax) + 8)
    x, w = np.polynomial.legendre.leggauss(n_theta)
    th = 0.5 * np.pi * (x + 1)  # Gauss-Legendre in theta on [0, pi]
    n_phi = 2 * n_theta
    ph = (np.arange(n_phi) + 0.5) * (2 * np.pi / n_phi)
    theta, phi = np.repeat(th, n_phi), np.tile(ph, n_theta)
    weights = np.repeat(0.5 * np.pi * w, n_phi) * (2 * np.pi / n_phi)  # for dtheta dphi
    ind = induced_geometry(surface, theta, phi, source, derivatives=surface_on_product(surface, th, ph))
    gam = ind.christoffel
    frame_scale = ind.sqrt_det / ind.metric[:, 1, 1]
    w_theta, w_phi = frame_scale * gam[:, 0, 0, 1], frame_scale * gam[:, 0, 1, 1]
    zeta, z_t, z_p = expand_on_product(zeta_lmax, th, ph, zeta_coefficients)[:3]
    poles = harmonic_values(zeta_lmax, np.array([0.0, np.pi]), np.zeros(2)) @ zeta_coefficients
    out = np.empty(n_max + 1)
    for n in range(n_max + 1):
        dP = _legendre(n, zeta, 1) if n > 0 else np.zeros_like(zeta)
        bulk = np.sum(weights * dP * (z_t * w_phi - z_p * w_theta))
        out[n] = 2 * np.pi * float(np.sum(_legendre(n, poles))) - bulk
    return out


def horizon_multipoles(
    surface: Surface,
    data,
    *,
    n_max: int = 8,
    spin: HorizonSpin | None = None,
    n_theta: int | None = None,
    order: int = 4,
) -> HorizonMultipoles:
    """Mass and spin multipoles of ``surface`` in ``data`` for n = 0 .. ``n_max``.

    ``spin`` (from :func:`horizon_spin` on the same surface and data) is computed if not given.
    ``n_theta``: nodes in theta of the integrals (default 2 max(l_max) + 8); the integrands
    P_n(zeta) grow in degree with n, so raise it for large n_max on distorted surfaces.
    """
    if n_max < 1:
        raise ValueError(f"n_max: expected an integer >= 1, got {n_max}")
    source = as_tracked_source(data, order=order)
    spin = horizon_spin(surface, source, order=order) if spin is None else spin
    lz, coefficients = spin.zeta_lmax, spin.zeta_coefficients
    M, R = spin.christodoulou_mass, spin.areal_radius
    curvature = curvature_moments(surface, source, lz, coefficients, n_max, n_theta=n_theta, order=order)
    quad = surface_quadrature(surface, source, lz, n_theta=n_theta or 2 * max(surface.lmax, lz) + 8)
    terms = potential_terms(quad, coefficients)
    n = np.arange(n_max + 1)
    mass_moments = M * R**n / (4 * np.pi) * curvature
    spin_moments = np.array([
        R ** (k + 1) / (8 * np.pi) * float(np.sum(quad.weights * _legendre(k, terms.zeta, 1) * terms.rotation_density))
        if k > 0 else 0.0
        for k in n
    ])
    scale = M ** (n + 1.0)
    arrays = (mass_moments, spin_moments, mass_moments / scale, spin_moments / scale)
    for arr in arrays:
        arr.setflags(write=False)
    return HorizonMultipoles(*arrays, mass=M, areal_radius=R, spin=spin)
