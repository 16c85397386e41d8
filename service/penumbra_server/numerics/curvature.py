"""Ricci curvature of the spatial metric at points, from any geometry source.

Geometry sources hand out gamma_ij and its first derivatives only, so the second derivatives
come from central differences of those first derivatives at points displaced by +- ``step``
along each axis (one source call on 6 N points). For the exact evaluators (first derivatives
exact to round-off) the error is O(step^2) relative.

    Gamma_kij = (d_i gamma_kj + d_j gamma_ki - d_k gamma_ij) / 2
    R_ij = d_k Gamma^k_ij - d_j Gamma^k_ik + Gamma^k_kl Gamma^l_ij - Gamma^k_jl Gamma^l_ik
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .geometry import GeometrySource, PointGeometry

__all__ = ["SpatialCurvature", "christoffel_lower", "spatial_ricci"]


@dataclass(frozen=True, eq=False)
class SpatialCurvature:
    """Ricci tensor R_ij (N, 3, 3) and scalar R (N,) of gamma_ij, units 1/M^2."""

    ricci: np.ndarray
    scalar: np.ndarray


def christoffel_lower(dgamma: np.ndarray) -> np.ndarray:
    """(N, 3, 3, 3) Gamma_kij from ``dgamma[n, k, i, j] = d_k gamma_ij`` (first index lowered)."""
    # d_i gamma_kj -> [n, i, k, j] transposed to [n, k, i, j]
    d_i_gkj = np.transpose(dgamma, (0, 2, 1, 3))
    d_j_gki = np.transpose(dgamma, (0, 2, 3, 1))
    return 0.5 * (d_i_gkj + d_j_gki - dgamma)


def spatial_ricci(points: np.ndarray, geometry: PointGeometry, source: GeometrySource, step: float) -> SpatialCurvature:
    """R_ij at ``points`` (N, 3) where ``geometry`` was evaluated by ``source``.

    Args:
        step: finite-difference step for the second metric derivatives, units of M. It must be
            small against the scale on which the metric varies. On grid data steps far below
            the spacing work too (measured: the interpolated first derivatives are continuous).

    Raises:
        ValueError: the displaced points are not covered by the source's data.
    """
    if not step > 0:
        raise ValueError(f"step: expected a positive length, got {step}")
    n = points.shape[0]
    offsets = np.concatenate([np.eye(3), -np.eye(3)]) * step  # (6, 3)
    shifted = (points[None, :, :] + offsets[:, None, :]).reshape(-1, 3)
    geo = source(shifted)
    if not geo.covered.all():
        raise ValueError(
            f"points: {int((~geo.covered).sum())} of {shifted.shape[0]} points within {step} M of the "
            "surface lie outside the data; curvature needs them"
        )
    dg = geo.dgamma.reshape(6, n, 3, 3, 3)
    # ddg[n, l, k, i, j] = d_l d_k gamma_ij, symmetrised in (l, k)
    ddg = np.transpose((dg[:3] - dg[3:]) / (2.0 * step), (1, 0, 2, 3, 4))
    ddg = 0.5 * (ddg + np.transpose(ddg, (0, 2, 1, 3, 4)))
    ginv = np.linalg.inv(geometry.gamma)
    gam_low = christoffel_lower(geometry.dgamma)  # [n, k, i, j]
    gam = np.einsum("nkm,nmij->nkij", ginv, gam_low)  # Gamma^k_ij
    # d_l Gamma_kij (lower), then raise: d_l Gamma^k_ij = g^km d_l Gamma_mij - g^ka d_l g_ab Gamma^b_ij
    d_gam_low = 0.5 * (
        np.transpose(ddg, (0, 1, 3, 2, 4))  # d_l d_i g_kj -> [n, l, k, i, j]
        + np.transpose(ddg, (0, 1, 3, 4, 2))  # d_l d_j g_ki
        - ddg  # d_l d_k g_ij
    )
    d_gam = np.einsum("nkm,nlmij->nlkij", ginv, d_gam_low) - np.einsum(
        "nka,nlab,nbij->nlkij", ginv, geometry.dgamma, gam
    )
    ricci = (
        np.einsum("nkkij->nij", d_gam)
        - np.einsum("njkik->nij", d_gam)
        + np.einsum("nkkl,nlij->nij", gam, gam)
        - np.einsum("nkjl,nlik->nij", gam, gam)
    )
    ricci = 0.5 * (ricci + np.transpose(ricci, (0, 2, 1)))
    return SpatialCurvature(ricci, np.einsum("nij,nij->n", ginv, ricci))
