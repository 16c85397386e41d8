"""Physical 3-geometry at a set of points: what every expansion evaluation consumes.

Both sources of geometry produce :class:`PointGeometry`: the grid sampler
(:mod:`penumbra_server.numerics.interpolation`) and the exact point evaluators of the reference
spacetimes (:mod:`penumbra_server.numerics.spacetimes`). A callable ``points -> PointGeometry``
is called a *geometry source* throughout the numerics.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

__all__ = ["PointGeometry", "GeometrySource", "physical_from_conformal", "symmetric_from_components", "inverse_3x3"]


@dataclass(frozen=True, eq=False)
class PointGeometry:
    """Spatial metric, its first derivatives and the extrinsic curvature at N points.

    Attributes:
        gamma: (N, 3, 3) spatial metric gamma_ij.
        dgamma: (N, 3, 3, 3) first derivatives, ``dgamma[n, k, i, j] = d_k gamma_ij``, units 1/M.
        K: (N, 3, 3) extrinsic curvature K_ij, units 1/M, sign with K = -nabla_mu n^mu.
        covered: (N,) bool; False where no data covers the point (values there are NaN).
        source_patch: (N,) int, index of the patch the data came from (-1: not covered or an
            exact evaluator).
    """

    gamma: np.ndarray
    dgamma: np.ndarray
    K: np.ndarray
    covered: np.ndarray
    source_patch: np.ndarray

    @property
    def count(self) -> int:
        return int(self.gamma.shape[0])


GeometrySource = Callable[[np.ndarray], PointGeometry]


def symmetric_from_components(components: np.ndarray) -> np.ndarray:
    """(..., 6) components in xx, xy, xz, yy, yz, zz order -> (..., 3, 3) symmetric tensors."""
    c = np.asarray(components)
    out = np.empty(c.shape[:-1] + (3, 3), dtype=c.dtype)
    out[..., 0, 0] = c[..., 0]
    out[..., 0, 1] = out[..., 1, 0] = c[..., 1]
    out[..., 0, 2] = out[..., 2, 0] = c[..., 2]
    out[..., 1, 1] = c[..., 3]
    out[..., 1, 2] = out[..., 2, 1] = c[..., 4]
    out[..., 2, 2] = c[..., 5]
    return out


def physical_from_conformal(
    chi: np.ndarray,
    dchi: np.ndarray,
    gamma_tilde: np.ndarray,
    dgamma_tilde: np.ndarray,
    A_tilde: np.ndarray,
    trace_K: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Physical (gamma_ij, d_k gamma_ij, K_ij) from conformal fields at points.

    gamma_ij = gamma_tilde_ij / chi and K_ij = (A_tilde_ij + gamma_tilde_ij trace_K / 3) / chi.

    Shapes: chi (N,), dchi (N, 3), gamma_tilde and A_tilde (N, 3, 3), dgamma_tilde (N, 3, 3, 3)
    with the derivative index first, trace_K (N,).
    """
    inv_chi = 1.0 / chi
    gamma = gamma_tilde * inv_chi[:, None, None]
    dgamma = (
        dgamma_tilde * inv_chi[:, None, None, None]
        - gamma_tilde[:, None, :, :] * (dchi * inv_chi[:, None] ** 2)[:, :, None, None]
    )
    K = (A_tilde + gamma_tilde * (trace_K / 3.0)[:, None, None]) * inv_chi[:, None, None]
    return gamma, dgamma, K


def inverse_3x3(m: np.ndarray) -> np.ndarray:
    """(..., 3, 3) inverses by cofactors: vectorised, several times faster than a batched
    LAPACK call for many small matrices. A singular matrix gives inf or NaN, not an error.
    The nine components are first copied to contiguous rows (faster whole-row arithmetic than
    on the strided components)."""
    components = np.ascontiguousarray(np.reshape(m, (-1, 9)).T, dtype=float)
    a, b, c, d, e, f, g, h, i = components
    cof = np.empty(components.shape)
    cof[0] = e * i - f * h
    cof[1] = c * h - b * i
    cof[2] = b * f - c * e
    cof[3] = f * g - d * i
    cof[4] = a * i - c * g
    cof[5] = c * d - a * f
    cof[6] = d * h - e * g
    cof[7] = b * g - a * h
    cof[8] = a * e - b * d
    det = a * cof[0] + b * cof[3] + c * cof[6]
    with np.errstate(divide="ignore", invalid="ignore"):
        cof /= det
    return np.ascontiguousarray(cof.T).reshape(np.shape(m))
