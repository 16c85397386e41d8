"""Independent reference: the smallest constant expansion c_min of surfaces enclosing an
equal-mass Brill-Lindquist pair on the z axis (tests only; uses nothing of penumbra_server).

With K_ij = 0 and gamma = psi^4 delta the expansion of a surface is its mean curvature,
Theta = psi^-2 (H_flat + 4 n . grad(psi) / psi), with H_flat the flat mean curvature and n the flat
unit normal. A surface of revolution r(theta) (polar form about the midpoint, mirror symmetric
through z = 0) has H_flat = kappa_meridian + n_rho / rho with

    kappa_meridian = (r^2 + 2 r'^2 - r r'') / (r^2 + r'^2)^(3/2),
    n = (r_hat - (r'/r) theta_hat) / sqrt(1 + (r'/r)^2).

r(theta) = sum_k a_k cos(2 k theta) (smooth at the poles, mirror symmetric); with a_0 held, the
other coefficients and c solve Theta(theta_i) = c at collocation points in (0, pi/2) (scipy
least_squares, Levenberg-Marquardt, on the square system); c(a_0) is then minimised (scipy bounded minimiser) inside its largest value.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import least_squares, minimize_scalar


def _expansion(theta, coeffs, mass, half_d):
    k = 2 * np.arange(coeffs.size)
    c, s = np.cos(np.outer(theta, k)), np.sin(np.outer(theta, k))
    r, dr, ddr = c @ coeffs, -(s * k) @ coeffs, -(c * k * k) @ coeffs
    st, ct = np.sin(theta), np.cos(theta)
    q = np.sqrt(r * r + dr * dr)
    kappa = (r * r + 2 * dr * dr - r * ddr) / q**3
    n_rho, n_z = (r * st - dr * ct) / q, (r * ct + dr * st) / q
    rho, z = r * st, r * ct
    psi, psi_rho, psi_z = np.ones_like(r), np.zeros_like(r), np.zeros_like(r)
    for zi in (half_d, -half_d):
        dist = np.sqrt(rho**2 + (z - zi) ** 2)
        psi += mass / (2 * dist)
        psi_rho -= mass * rho / (2 * dist**3)
        psi_z -= mass * (z - zi) / (2 * dist**3)
    h_flat = kappa + n_rho / rho
    return (h_flat + 4 * (n_rho * psi_rho + n_z * psi_z) / psi) / psi**2


def c_at(a0, mass, half_d, guess, terms):
    """(c, coefficients) of the constant-expansion surface with cos-coefficient a_0 held."""
    theta = (np.arange(terms) + 0.5) * np.pi / (2 * terms)

    def residual(x):
        coeffs = np.concatenate([[a0], x[1:]])
        return _expansion(theta, coeffs, mass, half_d) - x[0]

    x = least_squares(residual, guess, method="lm", xtol=1e-15, ftol=1e-15, gtol=1e-15).x
    if not np.max(np.abs(residual(x))) <= 1e-8:  # fsolve may call a converged solve "slow"
        return np.nan, x
    return x[0], x


def smallest_expansion(mass, separation, *, start=1.0, terms=16, step=0.02):
    """c_min (1/M) of the pair of bare masses ``mass`` at z = +-separation/2."""
    half_d = separation / 2
    x = np.zeros(terms)
    x[0] = 2.0 / start
    samples = []
    a0 = start
    while a0 > 0.05:
        c, x_new = c_at(a0, mass, half_d, x, terms)
        if not np.isfinite(c):
            raise RuntimeError(f"no solution at a_0 = {a0}")
        samples.append((a0, c, x_new))
        x = x_new
        if len(samples) >= 3 and samples[-1][1] > samples[-2][1] < samples[-3][1]:
            break
        a0 -= step
    (hi, _, _), (_, _, x_mid), (lo, _, _) = samples[-3:]
    best = minimize_scalar(lambda a: c_at(a, mass, half_d, x_mid, terms)[0], bounds=(lo, hi), method="bounded",
                           options={"xatol": 1e-7})
    return float(best.fun)
