"""A Kerr hole moving with constant velocity, in boosted Kerr-Schild form (exact 3+1 data).

The rest-frame Kerr-Schild metric g = eta + f l l (:class:`KerrKerrSchild`, spin along any
axis) is carried to the frame in which the hole moves with velocity v by the Lorentz boost
X = L (t, x - centre), L = [[g, -g v^T], [-g v, I + g^2/(g+1) v v^T]], g = 1/sqrt(1 - v^2).
eta is boost invariant, so the boosted metric is again Kerr-Schild, eta + f(X) l' l' with
l'_mu = L^a_mu l_a(X) null, and its 3+1 split on t = 0 is the general Kerr-Schild one:

    lapse = 1 / sqrt(1 + f l'_t^2),  beta_i = f l'_t l'_i,  gamma_ij = delta_ij + f l'_i l'_j,
    K_ij = -(d_t gamma_ij - D_i beta_j - D_j beta_i) / (2 lapse),

with d_t gamma_ij non-zero now (the hole moves), taken by complex-step differentiation like
every stationary 4-metric of :mod:`penumbra_server.numerics.spacetimes` (Matzner, Huq &
Shoemaker, PRD 59, 024015 (1999) for boosted Kerr-Schild holes; Kerr & Schild 1965).

The horizon is boost invariant as a null surface: its area stays 8 pi M r_+ and its intrinsic
geometry and spin stay those of Kerr (J = a M about the rest-frame axis); on t = 0 its
coordinate shape is the rest-frame one contracted along v by sqrt(1 - v^2).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .spacetimes import (
    KerrKerrSchild,
    _PointEvaluator,
    _Split,
    _apply_matrix,
    _as_vector,
    _kerr_schild_metric4,
    _split_from_metric4,
)

__all__ = ["BoostedKerrKerrSchild", "lorentz_boost"]


def lorentz_boost(velocity: np.ndarray) -> np.ndarray:
    """(4, 4) boost taking world (t, x) to the rest frame of a body moving with ``velocity``."""
    v = np.asarray(velocity, dtype=float)
    lf = 1.0 / np.sqrt(1.0 - v @ v)
    boost = np.empty((4, 4))
    boost[0, 0] = lf
    boost[0, 1:] = boost[1:, 0] = -lf * v
    # lf^2 / (lf + 1) = (lf - 1) / v^2, finite at v = 0.
    boost[1:, 1:] = np.eye(3) + (lf * lf / (lf + 1.0)) * np.outer(v, v)
    return boost


@dataclass(frozen=True, eq=False)
class BoostedKerrKerrSchild(_PointEvaluator):
    """Kerr (mass, spin a along ``axis`` in its rest frame) moving with ``velocity``, slice t = 0.

    Attributes:
        mass: M > 0 (rest mass).
        spin: Kerr parameter a, |a| < M (a length in units of M; J = a M).
        axis: (3,) spin direction in the rest frame's coordinates (normalised on construction).
        velocity: (3,) coordinate velocity v, |v| < 1.
        centre: (3,) position of the hole at t = 0 (world line centre + v t).
    """

    mass: float
    spin: float
    axis: np.ndarray = (0.0, 0.0, 1.0)
    velocity: np.ndarray = (0.0, 0.0, 0.0)
    centre: np.ndarray = (0.0, 0.0, 0.0)

    def __post_init__(self) -> None:
        rest = KerrKerrSchild(self.mass, self.spin, axis=self.axis)  # validates mass, spin, axis
        velocity = _as_vector(self.velocity, "velocity")
        if float(velocity @ velocity) >= 1.0:
            raise ValueError(f"velocity: expected |v| < 1, got {velocity.tolist()}")
        object.__setattr__(self, "mass", rest.mass)
        object.__setattr__(self, "spin", rest.spin)
        object.__setattr__(self, "axis", rest.axis)
        object.__setattr__(self, "velocity", velocity)
        object.__setattr__(self, "centre", _as_vector(self.centre, "centre"))
        # Derived once (not dataclass fields): the rest-frame hole and the boost to its frame.
        object.__setattr__(self, "_rest", rest)
        object.__setattr__(self, "_boost", lorentz_boost(velocity))

    @property
    def lorentz_factor(self) -> float:
        """gamma = 1 / sqrt(1 - v^2)."""
        return 1.0 / float(np.sqrt(1.0 - self.velocity @ self.velocity))

    @property
    def horizon_radius(self) -> float:
        """Rest-frame Kerr-Schild radius of the horizon r_+ = M + sqrt(M^2 - a^2)."""
        return self._rest.horizon_radius

    def _null_form(self, t: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        boost = self._boost
        rest = _apply_matrix(boost, np.concatenate([t[:, None], x - self.centre], axis=1))
        f, l_rest = self._rest._null_form(rest[:, 0], rest[:, 1:])
        return f, _apply_matrix(boost.T, l_rest)

    def _split(self, points: np.ndarray) -> _Split:
        with np.errstate(divide="ignore", invalid="ignore"):
            return _split_from_metric4(points, lambda t, x: _kerr_schild_metric4(t, x, self._null_form))
