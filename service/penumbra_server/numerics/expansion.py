"""The outgoing expansion of a star-shaped surface, evaluated pointwise.

With the level-set function F = r - h(theta, phi) about the surface centre, F_i = d_i F,
u = sqrt(gamma^ij F_i F_j) and outward unit normal s^i = gamma^ij F_j / u,

    Theta = D_i s^i - K + K_ij s^i s^j
          = (gamma^ij - s^i s^j) d_i d_j F / u
            + F^i F^a F^b d_i gamma_ab / (2 u^3)
            - Gamma^k F_k / u
            - K + K_ij s^i s^j,

where Gamma^k = gamma^ij Gamma^k_ij and d_i gamma^kl = -gamma^ka gamma^lb d_i gamma_ab was
used. Derivation: D_i s^i = D_i D^i F / u - F^i d_i u / u^2 with
D_i D^i F = gamma^ij d_i d_j F - Gamma^k F_k. Sign convention K = -nabla_mu n^mu.

Everything here is algebra at points: no interpolation, no state.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .geometry import PointGeometry, inverse_3x3
from .surfaces import RadiusDerivatives, unit_vectors

__all__ = [
    "LevelSetDerivatives",
    "level_set_derivatives",
    "ExpansionTerms",
    "GeometryTerms",
    "geometry_terms",
    "expansion_from",
    "expansion_at",
]


@dataclass(frozen=True, eq=False)
class LevelSetDerivatives:
    """Cartesian first (N, 3) and second (N, 3, 3) derivatives of F = r - h at N surface points."""

    dF: np.ndarray
    ddF: np.ndarray


def level_set_derivatives(rd: RadiusDerivatives, frame=None) -> LevelSetDerivatives:
    """d_i F and d_i d_j F at the surface points described by ``rd`` (where r = h).

    Uses d_i r = n_i, d_i theta = e_theta_i / r, d_i phi = e_phi_i / (r sin theta) and their
    derivatives; the nodes never sit on a pole, so 1 / sin(theta) is finite. The angles are (N,);
    h and its derivatives may carry leading axes (..., N) (several shapes on the same directions),
    giving dF (..., N, 3) and ddF (..., N, 3, 3). ``frame``: :func:`unit_vectors` at the angles,
    when the caller already has them.
    """
    n, et, ep = unit_vectors(rd.theta, rd.phi) if frame is None else frame
    r = rd.h
    st, ct = np.sin(rd.theta), np.cos(rd.theta)
    inv_r = 1.0 / r
    inv_rs = inv_r / st
    grad_t = et * inv_r[..., None]
    grad_p = ep * inv_rs[..., None]
    dF = n - rd.h_t[..., None] * grad_t - rd.h_p[..., None] * grad_p

    def outer(a, b):
        return a[..., :, None] * b[..., None, :]

    def sym(a, b):
        return outer(a, b) + outer(b, a)

    eye = np.eye(3)
    hess_r = (eye - outer(n, n)) * inv_r[..., None, None]
    hess_t = (-sym(et, n) + (ct / st)[:, None, None] * outer(ep, ep)) * (inv_r**2)[..., None, None]
    rad_mix = st[:, None] * n + ct[:, None] * et  # d e_phi / d phi = -(this)
    hess_p = -sym(rad_mix, ep) * (inv_r**2 / st**2)[..., None, None]
    ddF = (
        hess_r
        - rd.h_t[..., None, None] * hess_t
        - rd.h_p[..., None, None] * hess_p
        - rd.h_tt[..., None, None] * outer(grad_t, grad_t)
        - rd.h_tp[..., None, None] * sym(grad_t, grad_p)
        - rd.h_pp[..., None, None] * outer(grad_p, grad_p)
    )
    return LevelSetDerivatives(dF, ddF)


@dataclass(frozen=True, eq=False)
class ExpansionTerms:
    """Theta (N,) with the pieces measures reuse: unit normal s^i (N, 3) and u = |dF| (N,)."""

    theta: np.ndarray
    normal_up: np.ndarray
    u: np.ndarray


@dataclass(frozen=True, eq=False)
class GeometryTerms:
    """What Theta needs of the geometry at N points, independent of the surface's shape:
    gamma^ij (N, 3, 3), d_k gamma_ij (N, 3, 3, 3), the contraction C_l = gamma^ij d_i gamma_lj -
    (1/2) gamma^ij d_l gamma_ij (N, 3) (so Gamma^k F_k = F^l C_l), K = gamma^ij K_ij (N,) and
    K_ij (N, 3, 3). Made once and shared by every shape evaluated at the same points (the
    Jacobian's perturbations)."""

    ginv: np.ndarray
    dgamma: np.ndarray
    contracted: np.ndarray
    trace_K: np.ndarray
    K: np.ndarray


def geometry_terms(geometry: PointGeometry) -> GeometryTerms:
    """:class:`GeometryTerms` of the geometry at N points."""
    ginv = inverse_3x3(geometry.gamma)
    dg = geometry.dgamma  # [n, k, i, j] = d_k gamma_ij
    contracted = np.einsum("nij,nilj->nl", ginv, dg) - 0.5 * np.einsum("nij,nlij->nl", ginv, dg)
    trace_K = np.einsum("nij,nij->n", ginv, geometry.K)
    return GeometryTerms(ginv, dg, contracted, trace_K, geometry.K)


def expansion_from(dF: np.ndarray, ddF: np.ndarray, terms: GeometryTerms) -> ExpansionTerms:
    """Theta (1/M) from the level-set derivatives dF (..., N, 3), ddF (..., N, 3, 3) and the
    geometry terms at the N points; leading axes (several shapes at the same points) broadcast."""
    ginv, dg = terms.ginv, terms.dgamma
    F_up = np.einsum("...nij,...nj->...ni", ginv, dF)
    u2 = np.einsum("...ni,...ni->...n", F_up, dF)
    with np.errstate(invalid="ignore"):  # u2 < 0 only for a non-positive metric: NaN, seen upstream
        u = np.sqrt(u2)
    s_up = F_up / u[..., None]
    proj = ginv - s_up[..., :, None] * s_up[..., None, :]
    term_hess = np.einsum("...nij,...nij->...n", proj, ddF) / u
    term_dg = np.einsum("...ni,...na,...nb,...niab->...n", F_up, F_up, F_up, dg) / (2.0 * u**3)
    term_gamma = np.einsum("...nl,...nl->...n", F_up, terms.contracted) / u
    Kss = np.einsum("...nij,...ni,...nj->...n", terms.K, s_up, s_up)
    theta = term_hess + term_dg - term_gamma - terms.trace_K + Kss
    return ExpansionTerms(theta, s_up, u)


def expansion_at(rd: RadiusDerivatives, geometry: PointGeometry) -> ExpansionTerms:
    """Outgoing expansion Theta (units 1/M) at surface points, geometry given there.

    ``geometry`` must hold the fields at the points centre + h n of ``rd``, in the same order.
    """
    ls = level_set_derivatives(rd)
    return expansion_from(ls.dF, ls.ddF, geometry_terms(geometry))
