"""Exact reference spacetimes: 3+1 data at points, and sampled onto patches and slices.

Conventions (see the project's design notes): geometric units G = c = 1, every length in units
of the run's mass scale M, 4-metric signature (-, +, +, +), and

    K_ij = -(1 / 2 alpha) (d_t gamma_ij - D_i beta_j - D_j beta_i),

the sign with K = -nabla_mu n^mu (a Schwarzschild Kerr-Schild slice has K > 0).

Two kinds of spacetime live here:

* Conformally flat, time-symmetric data (K_ij = 0, gamma_ij = psi^4 delta_ij):
  :class:`SchwarzschildIsotropic` and :class:`BrillLindquist`, evaluated analytically.
* Stationary (or boosted stationary) 4-metrics: the Kerr-Schild family
  g = eta + f l l (:class:`SchwarzschildKerrSchild`, :class:`KerrKerrSchild`,
  :class:`BoostedSchwarzschildKerrSchild`) and the Painleve-Gullstrand form of Schwarzschild
  (:class:`SchwarzschildPainleveGullstrand`). Their 3+1 split is taken on the slice t = 0 of
  the coordinates in which the 4-metric is written; first derivatives of the 4-metric, time
  derivative included, come from complex-step differentiation (d_mu g = Im g(x + i h e_mu) / h),
  which has no subtractive cancellation and so is exact to round-off. Every operation in the
  metric functions is therefore complex-analytic (no abs, no max; radii are square roots of
  written-out sums of squares).

Singularities are not hidden: at a puncture (conformally flat data) the metric is infinite, at
the Kerr-Schild singularity (r = 0: the centre for Schwarzschild, the ring of coordinate radius
|a| in the equatorial plane for Kerr) the values are infinite or NaN. A grid node placed exactly
there yields non-finite samples; offset the grid (e.g. by half a spacing) so that no node hits
it. :meth:`penumbra_server.numerics.slices.Slice.check_finite` reports such nodes.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Mapping, Sequence

import numpy as np

from .geometry import PointGeometry
from .slices import (
    Patch,
    Slice,
    SliceError,
    SYMMETRIC_INDEX_PAIRS,
    SYMMETRIC_SUFFIXES,
    VariableSet,
)

__all__ = [
    "SchwarzschildIsotropic",
    "SchwarzschildKerrSchild",
    "SchwarzschildPainleveGullstrand",
    "KerrKerrSchild",
    "BoostedSchwarzschildKerrSchild",
    "BrillLindquist",
    "Spacetime",
    "sample_patch",
    "sample_slice",
]

#: Imaginary step of the complex-step derivative. Any tiny value works (there is no
#: cancellation); the truncation error is O(h^2) relative, far below round-off.
_COMPLEX_STEP = 1e-20

#: Points evaluated at once when sampling grids: bounds the temporary arrays (the complex
#: 4-metrics and their derivatives) to a few tens of MB whatever the grid size.
_CHUNK_POINTS = 4096

_MINKOWSKI = np.diag([-1.0, 1.0, 1.0, 1.0])


# ----------------------------------------------------------------------------------------------
# Input normalisation


def _as_vector(value, name: str) -> np.ndarray:
    arr = np.array(value, dtype=float)
    if arr.shape != (3,):
        raise ValueError(f"{name}: expected three numbers (x, y, z), got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name}: expected finite numbers, got {arr.tolist()}")
    arr.setflags(write=False)
    return arr


def _as_positive(value, name: str) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name}: expected a number, got {value!r}") from None
    if not (np.isfinite(number) and number > 0):
        raise ValueError(f"{name}: expected a finite number > 0, got {value!r}")
    return number


def _as_points(points) -> np.ndarray:
    arr = np.asarray(points, dtype=float)
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise ValueError(f"points: expected an array of shape (N, 3), got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError("points: expected finite coordinates, got NaN or infinity")
    return arr


# ----------------------------------------------------------------------------------------------
# The 3+1 split at points


@dataclass(frozen=True, eq=False)
class _Split:
    """3+1 data at N points: gamma (N,3,3), dgamma (N,3,3,3) [n,k,i,j] = d_k gamma_ij,
    K (N,3,3), lapse (N,), shift (N,3) contravariant beta^i."""

    gamma: np.ndarray
    dgamma: np.ndarray
    K: np.ndarray
    lapse: np.ndarray
    shift: np.ndarray


# A 4-metric function: (t (n,), x (n,3)) -> (g (n,4,4), lapse (n,)), real or complex inputs.
_Metric4 = Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]]


def _inverse_symmetric3(m: np.ndarray) -> np.ndarray:
    """Inverse of symmetric (N, 3, 3) matrices by cofactors (vectorised; much faster than a
    batched LU for 3x3)."""
    xx, xy, xz = m[:, 0, 0], m[:, 0, 1], m[:, 0, 2]
    yy, yz, zz = m[:, 1, 1], m[:, 1, 2], m[:, 2, 2]
    c_xx = yy * zz - yz * yz
    c_xy = xz * yz - xy * zz
    c_xz = xy * yz - xz * yy
    c_yy = xx * zz - xz * xz
    c_yz = xy * xz - xx * yz
    c_zz = xx * yy - xy * xy
    inv_det = 1.0 / (xx * c_xx + xy * c_xy + xz * c_xz)
    out = np.empty_like(m)
    out[:, 0, 0] = c_xx * inv_det
    out[:, 0, 1] = out[:, 1, 0] = c_xy * inv_det
    out[:, 0, 2] = out[:, 2, 0] = c_xz * inv_det
    out[:, 1, 1] = c_yy * inv_det
    out[:, 1, 2] = out[:, 2, 1] = c_yz * inv_det
    out[:, 2, 2] = c_zz * inv_det
    return out


def _split_from_metric4(points: np.ndarray, metric4: _Metric4) -> _Split:
    """3+1 split on t = 0 of a 4-metric, derivatives by complex step.

    gamma_ij = g_ij, beta_i = g_ti, and
    K_ij = -(d_t g_ij - D_i beta_j - D_j beta_i) / (2 alpha) with
    D_i beta_j = d_i beta_j - Gamma^l_ij beta_l = d_i beta_j - Gamma_lij beta^l.
    """
    count = points.shape[0]
    time = np.zeros(count)
    g, lapse = metric4(time, points)
    g = np.real(g)
    lapse = np.real(lapse)

    # dg[n, mu, a, b] = d_mu g_ab
    dg = np.empty((count, 4, 4, 4))
    for mu in range(4):
        t_c = time.astype(complex)
        x_c = points.astype(complex)
        if mu == 0:
            t_c += 1j * _COMPLEX_STEP
        else:
            x_c[:, mu - 1] += 1j * _COMPLEX_STEP
        g_c, _ = metric4(t_c, x_c)
        dg[:, mu] = np.imag(g_c) / _COMPLEX_STEP

    gamma = np.ascontiguousarray(g[:, 1:, 1:])
    beta_low = g[:, 0, 1:]
    beta_up = np.einsum("nij,nj->ni", _inverse_symmetric3(gamma), beta_low)
    dgamma = np.ascontiguousarray(dg[:, 1:, 1:, 1:])  # [n, k, i, j]
    dt_gamma = dg[:, 0, 1:, 1:]
    dbeta_low = dg[:, 1:, 0, 1:]  # [n, i, j] = d_i beta_j

    # Christoffel symbols of the first kind, [n, l, i, j] = Gamma_lij.
    christoffel = 0.5 * (
        dgamma.transpose(0, 2, 1, 3) + dgamma.transpose(0, 2, 3, 1) - dgamma
    )
    cov_dbeta = dbeta_low - np.einsum("nlij,nl->nij", christoffel, beta_up)
    K = -(dt_gamma - cov_dbeta - cov_dbeta.transpose(0, 2, 1)) / (2.0 * lapse[:, None, None])
    return _Split(gamma=gamma, dgamma=dgamma, K=K, lapse=lapse, shift=beta_up)


def _kerr_schild_metric4(
    t: np.ndarray, x: np.ndarray, null_form: Callable[[np.ndarray, np.ndarray], tuple]
) -> tuple[np.ndarray, np.ndarray]:
    """g = eta + f l l and lapse = 1 / sqrt(1 + f l_t^2) from a null form (f, l_mu)."""
    f, l_cov = null_form(t, x)
    g = (f[:, None] * l_cov)[:, :, None] * l_cov[:, None, :]
    g += _MINKOWSKI
    lapse = 1.0 / np.sqrt(1.0 + f * l_cov[:, 0] ** 2)
    return g, lapse


def _schwarzschild_null_form(mass: float, x_rel: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Kerr-Schild Schwarzschild in its rest frame: f = 2M/r, l_mu = (1, x_i / r)."""
    x, y, z = x_rel[:, 0], x_rel[:, 1], x_rel[:, 2]
    r = np.sqrt(x * x + y * y + z * z)
    f = 2.0 * mass / r
    l_cov = np.stack([np.ones_like(r), x / r, y / r, z / r], axis=1)
    return f, l_cov


def _conformally_flat_split(
    points: np.ndarray, masses: np.ndarray, positions: np.ndarray, lapse: np.ndarray
) -> _Split:
    """gamma = psi^4 delta, K = 0, psi = 1 + sum m_i / (2 |x - x_i|) (analytic)."""
    psi, dpsi = _conformal_factor_and_gradient(points, masses, positions)
    count = points.shape[0]
    # Fill the diagonals only, so that off-diagonal entries stay 0 even at a puncture.
    gamma = np.zeros((count, 3, 3))
    dgamma = np.zeros((count, 3, 3, 3))
    with np.errstate(invalid="ignore", over="ignore"):
        psi4 = psi**4
        dpsi4 = (4.0 * psi**3)[:, None] * dpsi
    for i in range(3):
        gamma[:, i, i] = psi4
        dgamma[:, :, i, i] = dpsi4
    return _Split(
        gamma=gamma,
        dgamma=dgamma,
        K=np.zeros((count, 3, 3)),
        lapse=lapse,
        shift=np.zeros((count, 3)),
    )


def _conformal_factor_and_gradient(
    points: np.ndarray, masses: np.ndarray, positions: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    psi = np.ones(points.shape[0])
    dpsi = np.zeros((points.shape[0], 3))
    with np.errstate(divide="ignore", invalid="ignore"):
        for m, pos in zip(masses, positions):
            d = points - pos
            r = np.sqrt(np.einsum("ni,ni->n", d, d))
            psi += 0.5 * m / r
            dpsi -= (0.5 * m / r**3)[:, None] * d
    return psi, dpsi


def _geometry_from_split(split: _Split) -> PointGeometry:
    count = split.gamma.shape[0]
    return PointGeometry(
        gamma=split.gamma,
        dgamma=split.dgamma,
        K=split.K,
        covered=np.ones(count, dtype=bool),
        source_patch=np.full(count, -1, dtype=int),
    )


def _adm_from_split(split: _Split) -> dict[str, np.ndarray]:
    fields: dict[str, np.ndarray] = {}
    for suffix, (i, j) in zip(SYMMETRIC_SUFFIXES, SYMMETRIC_INDEX_PAIRS):
        fields[f"gamma_{suffix}"] = split.gamma[:, i, j].copy()
    for suffix, (i, j) in zip(SYMMETRIC_SUFFIXES, SYMMETRIC_INDEX_PAIRS):
        fields[f"K_{suffix}"] = split.K[:, i, j].copy()
    fields["lapse"] = split.lapse.copy()
    for axis, name in enumerate(("shift_x", "shift_y", "shift_z")):
        fields[name] = split.shift[:, axis].copy()
    return fields


class _PointEvaluator:
    """Shared public methods; subclasses provide ``_split(points) -> _Split``."""

    def _split(self, points: np.ndarray) -> _Split:  # pragma: no cover - abstract
        raise NotImplementedError

    def geometry(self, points) -> PointGeometry:
        """Exact gamma_ij, d_k gamma_ij and K_ij at points (N, 3) (units of M).

        Returns a :class:`PointGeometry` with ``covered`` all True and ``source_patch`` all -1.
        Values at a singularity (puncture, r = 0, Kerr ring) are inf or NaN.
        """
        return _geometry_from_split(self._split(_as_points(points)))

    def adm_fields(self, points) -> dict[str, np.ndarray]:
        """ADM fields at points (N, 3): gamma_xx..gamma_zz, K_xx..K_zz, lapse, shift_x..shift_z,
        each an (N,) array (shift is the contravariant beta^i)."""
        return _adm_from_split(self._split(_as_points(points)))


# ----------------------------------------------------------------------------------------------
# Conformally flat, time-symmetric data


@dataclass(frozen=True, eq=False)
class SchwarzschildIsotropic(_PointEvaluator):
    """Schwarzschild on the time-symmetric slice in isotropic coordinates.

    gamma_ij = psi^4 delta_ij, psi = 1 + M / (2 r), K_ij = 0, shift 0, and the static lapse
    alpha = (1 - M/2r) / (1 + M/2r) = (2r - M) / (2r + M) (negative inside the throat r < M/2).
    Apparent horizon at r = M / 2.

    Attributes:
        mass: M > 0.
        centre: (3,) position of the puncture.
    """

    mass: float
    centre: np.ndarray = (0.0, 0.0, 0.0)

    def __post_init__(self) -> None:
        object.__setattr__(self, "mass", _as_positive(self.mass, "mass"))
        object.__setattr__(self, "centre", _as_vector(self.centre, "centre"))

    def conformal_factor(self, points) -> np.ndarray:
        """psi (N,) at points (N, 3); infinite at the puncture."""
        psi, _ = _conformal_factor_and_gradient(
            _as_points(points), np.array([self.mass]), self.centre[None]
        )
        return psi

    def _split(self, points: np.ndarray) -> _Split:
        d = points - self.centre
        r = np.sqrt(np.einsum("ni,ni->n", d, d))
        lapse = (2.0 * r - self.mass) / (2.0 * r + self.mass)
        return _conformally_flat_split(points, np.array([self.mass]), self.centre[None], lapse)


@dataclass(frozen=True, eq=False)
class BrillLindquist(_PointEvaluator):
    """Brill-Lindquist data with n punctures: time-symmetric, conformally flat.

    gamma_ij = psi^4 delta_ij, psi = 1 + sum_i m_i / (2 |x - x_i|), K_ij = 0, shift 0.
    The lapse is set to 1 (a choice: the data fix no lapse).

    Attributes:
        masses: (n,) bare masses m_i > 0.
        positions: (n, 3) puncture positions.
    """

    masses: np.ndarray
    positions: np.ndarray

    def __post_init__(self) -> None:
        masses = np.array(self.masses, dtype=float).reshape(-1)
        positions = np.array(self.positions, dtype=float)
        if masses.size == 0:
            raise ValueError("masses: expected at least one bare mass")
        if not np.all(np.isfinite(masses)) or np.any(masses <= 0):
            raise ValueError(f"masses: expected finite numbers > 0, got {masses.tolist()}")
        if positions.shape != (masses.size, 3):
            raise ValueError(
                f"positions: expected shape ({masses.size}, 3) to match masses, got {positions.shape}"
            )
        if not np.all(np.isfinite(positions)):
            raise ValueError("positions: expected finite coordinates")
        masses.setflags(write=False)
        positions.setflags(write=False)
        object.__setattr__(self, "masses", masses)
        object.__setattr__(self, "positions", positions)

    @property
    def total_mass(self) -> float:
        """Sum of the bare masses (the ADM mass of the data)."""
        return float(self.masses.sum())

    def conformal_factor(self, points) -> np.ndarray:
        """psi (N,) at points (N, 3); infinite at each puncture."""
        psi, _ = _conformal_factor_and_gradient(_as_points(points), self.masses, self.positions)
        return psi

    def _split(self, points: np.ndarray) -> _Split:
        return _conformally_flat_split(
            points, self.masses, self.positions, np.ones(points.shape[0])
        )


# ----------------------------------------------------------------------------------------------
# Stationary 4-metrics


@dataclass(frozen=True, eq=False)
class SchwarzschildKerrSchild(_PointEvaluator):
    """Schwarzschild in Kerr-Schild (ingoing Eddington-Finkelstein) coordinates, slice t = 0.

    g = eta + (2M/r) l l with l_mu = (1, x_i / r): gamma_ij = delta_ij + (2M/r) n_i n_j,
    alpha = (1 + 2M/r)^(-1/2), beta^i = 2M / (r + 2M) n^i. Horizon at r = 2M.

    Attributes:
        mass: M > 0.
        centre: (3,) position of the singularity r = 0.
    """

    mass: float
    centre: np.ndarray = (0.0, 0.0, 0.0)

    def __post_init__(self) -> None:
        object.__setattr__(self, "mass", _as_positive(self.mass, "mass"))
        object.__setattr__(self, "centre", _as_vector(self.centre, "centre"))

    def _null_form(self, t: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return _schwarzschild_null_form(self.mass, x - self.centre)

    def _split(self, points: np.ndarray) -> _Split:
        with np.errstate(divide="ignore", invalid="ignore"):
            return _split_from_metric4(
                points, lambda t, x: _kerr_schild_metric4(t, x, self._null_form)
            )


@dataclass(frozen=True, eq=False)
class SchwarzschildPainleveGullstrand(_PointEvaluator):
    """Schwarzschild in (ingoing) Painleve-Gullstrand coordinates, slice t = 0.

    ds^2 = -dt^2 + (dx^i + beta^i dt)(dx_i + beta_i dt) with flat gamma_ij, lapse 1 and the
    outward shift beta^i = sqrt(2M/r) n^i; then
    K_ij = (sqrt(2M/r) / r) [delta_ij - (3/2) n_i n_j] and the expansion of a sphere is
    Theta(r) = (2/r)(1 - sqrt(2M/r)), zero at the horizon r = 2M.

    Attributes:
        mass: M > 0.
        centre: (3,) position of r = 0.
    """

    mass: float
    centre: np.ndarray = (0.0, 0.0, 0.0)

    def __post_init__(self) -> None:
        object.__setattr__(self, "mass", _as_positive(self.mass, "mass"))
        object.__setattr__(self, "centre", _as_vector(self.centre, "centre"))

    def _metric4(self, t: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        d = x - self.centre
        r = np.sqrt(d[:, 0] ** 2 + d[:, 1] ** 2 + d[:, 2] ** 2)
        beta = (np.sqrt(2.0 * self.mass / r) / r)[:, None] * d  # beta_i = beta^i (flat gamma)
        g = np.zeros((x.shape[0], 4, 4), dtype=np.result_type(x, t))
        g[:, 0, 0] = -1.0 + 2.0 * self.mass / r
        g[:, 0, 1:] = beta
        g[:, 1:, 0] = beta
        g[:, 1:, 1:] = np.eye(3)
        return g, np.ones(x.shape[0])

    def _split(self, points: np.ndarray) -> _Split:
        with np.errstate(divide="ignore", invalid="ignore"):
            return _split_from_metric4(points, self._metric4)


def _apply_matrix(matrix: np.ndarray, vectors: np.ndarray) -> np.ndarray:
    """out[n, a] = sum_b matrix[a, b] vectors[n, b] for a small real matrix and real or complex
    vectors, as explicit sums (numpy's matmul of complex by real arrays is far slower)."""
    rows, cols = matrix.shape
    out = np.empty((vectors.shape[0], rows), dtype=np.result_type(matrix, vectors))
    for a in range(rows):
        out[:, a] = sum(matrix[a, b] * vectors[:, b] for b in range(cols))
    return out


def _frame_with_third_axis(axis: np.ndarray) -> np.ndarray:
    """A proper rotation R (rows e1, e2, axis; det +1) taking world vectors to a frame whose
    z-axis is ``axis``: x_body = R x_world."""
    helper = np.eye(3)[int(np.argmin(np.abs(axis)))]
    e1 = np.cross(helper, axis)
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(axis, e1)
    return np.array([e1, e2, axis])


@dataclass(frozen=True, eq=False)
class KerrKerrSchild(_PointEvaluator):
    """Kerr in Cartesian Kerr-Schild form, slice t = 0, spin along an arbitrary unit axis.

    In the body frame (z along ``axis``, origin at ``centre``) g = eta + f l l with
    f = 2 M r^3 / (r^4 + a^2 z^2), l_mu = (1, (r x + a y)/(r^2 + a^2), (r y - a x)/(r^2 + a^2), z/r)
    and r the root of (x^2 + y^2)/(r^2 + a^2) + z^2/r^2 = 1; the world frame follows by rotating
    l_i as a covector. Horizon at r_+ = M + sqrt(M^2 - a^2); angular momentum J = a M along
    ``axis``.

    Attributes:
        mass: M > 0.
        spin: the Kerr parameter a = J / M, a length in the same units as the mass (so the
            dimensionless spin is a / M); |a| < M. Negative a spins against ``axis``.
        axis: (3,) spin direction; normalised on construction.
        centre: (3,) centre of the ring singularity.
    """

    mass: float
    spin: float
    axis: np.ndarray = (0.0, 0.0, 1.0)
    centre: np.ndarray = (0.0, 0.0, 0.0)

    def __post_init__(self) -> None:
        mass = _as_positive(self.mass, "mass")
        try:
            spin = float(self.spin)
        except (TypeError, ValueError):
            raise ValueError(f"spin: expected a number, got {self.spin!r}") from None
        if not (np.isfinite(spin) and abs(spin) < mass):
            raise ValueError(f"spin: expected |a| < mass = {mass}, got {self.spin!r}")
        axis = np.array(_as_vector(self.axis, "axis"))
        norm = float(np.linalg.norm(axis))
        if norm == 0.0:
            raise ValueError("axis: expected a non-zero vector")
        axis /= norm
        axis.setflags(write=False)
        object.__setattr__(self, "mass", mass)
        object.__setattr__(self, "spin", spin)
        object.__setattr__(self, "axis", axis)
        object.__setattr__(self, "centre", _as_vector(self.centre, "centre"))
        # Derived once (not a dataclass field): world -> body-frame rotation.
        object.__setattr__(self, "_rotation", _frame_with_third_axis(axis))

    @property
    def horizon_radius(self) -> float:
        """Kerr-Schild radius of the horizon r_+ = M + sqrt(M^2 - a^2)."""
        return self.mass + float(np.sqrt(self.mass**2 - self.spin**2))

    def _null_form(self, t: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        rotation = self._rotation
        body = _apply_matrix(rotation, x - self.centre)
        bx, by, bz = body[:, 0], body[:, 1], body[:, 2]
        a = self.spin
        a2 = a * a
        w = bx * bx + by * by + bz * bz - a2
        s = np.sqrt(w * w + 4.0 * a2 * bz * bz)
        # r^2 = (w + s) / 2, written without cancellation on either side of w = 0; the branch
        # is chosen on the real part only, so both branches stay complex-analytic.
        r2 = np.where(np.real(w) >= 0.0, 0.5 * (w + s), 2.0 * a2 * bz * bz / (s - w))
        r = np.sqrt(r2)
        f = 2.0 * self.mass * r * r2 / (r2 * r2 + a2 * bz * bz)
        denom = r2 + a2
        l_body = np.stack([(r * bx + a * by) / denom, (r * by - a * bx) / denom, bz / r], axis=1)
        l_cov = np.concatenate([np.ones_like(r)[:, None], _apply_matrix(rotation.T, l_body)], axis=1)
        return f, l_cov

    def _split(self, points: np.ndarray) -> _Split:
        with np.errstate(divide="ignore", invalid="ignore"):
            return _split_from_metric4(
                points, lambda t, x: _kerr_schild_metric4(t, x, self._null_form)
            )


@dataclass(frozen=True, eq=False)
class BoostedSchwarzschildKerrSchild(_PointEvaluator):
    """A Kerr-Schild Schwarzschild hole moving with constant velocity, slice t = 0.

    The rest-frame 4-metric eta + (2M/r) l l is carried to the frame in which the hole moves
    with ``velocity`` v by the Lorentz boost X = L (t, x - centre), with
    L = [[g, -g v^T], [-g v, I + g^2/(g+1) v v^T]] and g = 1/sqrt(1 - v^2); eta is invariant,
    so the boosted metric is eta + f(X) l' l' with l'_mu = L^a_mu l_a(X), still null. The hole
    is at ``centre`` at t = 0 (world line centre + v t); on the slice t = 0 its horizon is the
    Lorentz-contracted sphere gamma^2 (x_par)^2 + x_perp^2 = (2M)^2.

    Attributes:
        mass: M > 0 (rest mass).
        velocity: (3,) coordinate velocity v, |v| < 1.
        centre: (3,) position of the hole at t = 0.
    """

    mass: float
    velocity: np.ndarray
    centre: np.ndarray = (0.0, 0.0, 0.0)

    def __post_init__(self) -> None:
        object.__setattr__(self, "mass", _as_positive(self.mass, "mass"))
        velocity = _as_vector(self.velocity, "velocity")
        if float(velocity @ velocity) >= 1.0:
            raise ValueError(f"velocity: expected |v| < 1, got {velocity.tolist()}")
        object.__setattr__(self, "velocity", velocity)
        object.__setattr__(self, "centre", _as_vector(self.centre, "centre"))
        # Derived once (not a dataclass field): the boost to the hole's rest frame.
        object.__setattr__(self, "_boost", self._boost_matrix())

    @property
    def lorentz_factor(self) -> float:
        """gamma = 1 / sqrt(1 - v^2)."""
        return 1.0 / float(np.sqrt(1.0 - self.velocity @ self.velocity))

    def at_time(self, time: float) -> "BoostedSchwarzschildKerrSchild":
        """The same spacetime with its slice t = 0 moved to coordinate time ``time``: the data
        of the slice t = time are the t = 0 data translated by v t (the metric depends on
        (t, x) only through x - centre - v t)."""
        return BoostedSchwarzschildKerrSchild(
            self.mass, self.velocity, self.centre + self.velocity * float(time)
        )

    def _boost_matrix(self) -> np.ndarray:
        v = self.velocity
        lf = self.lorentz_factor
        boost = np.empty((4, 4))
        boost[0, 0] = lf
        boost[0, 1:] = boost[1:, 0] = -lf * v
        # lf^2 / (lf + 1) = (lf - 1) / v^2, finite at v = 0.
        boost[1:, 1:] = np.eye(3) + (lf * lf / (lf + 1.0)) * np.outer(v, v)
        return boost

    def _null_form(self, t: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        boost = self._boost
        world = np.concatenate([t[:, None], x - self.centre], axis=1)
        rest = _apply_matrix(boost, world)
        f, l_rest = _schwarzschild_null_form(self.mass, rest[:, 1:])
        return f, _apply_matrix(boost.T, l_rest)

    def _split(self, points: np.ndarray) -> _Split:
        with np.errstate(divide="ignore", invalid="ignore"):
            return _split_from_metric4(
                points, lambda t, x: _kerr_schild_metric4(t, x, self._null_form)
            )


Spacetime = (
    SchwarzschildIsotropic
    | SchwarzschildKerrSchild
    | SchwarzschildPainleveGullstrand
    | KerrKerrSchild
    | BoostedSchwarzschildKerrSchild
    | BrillLindquist
)


# ----------------------------------------------------------------------------------------------
# Sampling onto patches and slices


def _variable_set_fields(split: _Split, variable_set: VariableSet) -> dict[str, np.ndarray]:
    """Fields of ``variable_set`` (plus lapse and shift) from 3+1 data at points."""
    if variable_set is VariableSet.ADM:
        return _adm_from_split(split)
    gamma, K = split.gamma, split.K
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        chi = np.linalg.det(gamma) ** (-1.0 / 3.0)
        gamma_tilde = chi[:, None, None] * gamma
        trace_K = np.einsum("nij,nij->n", _inverse_symmetric3(gamma), K)
        A_tilde = chi[:, None, None] * (K - gamma * (trace_K / 3.0)[:, None, None])
        if variable_set is VariableSet.CONFORMAL_CHI:
            factor = chi
        elif variable_set is VariableSet.CONFORMAL_W:
            factor = np.sqrt(chi)
        else:
            factor = -0.25 * np.log(chi)
    fields = {variable_set.conformal_factor_name: factor}
    for suffix, (i, j) in zip(SYMMETRIC_SUFFIXES, SYMMETRIC_INDEX_PAIRS):
        fields[f"gamma_tilde_{suffix}"] = gamma_tilde[:, i, j].copy()
    for suffix, (i, j) in zip(SYMMETRIC_SUFFIXES, SYMMETRIC_INDEX_PAIRS):
        fields[f"A_tilde_{suffix}"] = A_tilde[:, i, j].copy()
    fields["trace_K"] = trace_K
    fields["lapse"] = split.lapse.copy()
    for axis, name in enumerate(("shift_x", "shift_y", "shift_z")):
        fields[name] = split.shift[:, axis].copy()
    return fields


def sample_patch(
    spacetime: Spacetime,
    *,
    origin,
    spacing,
    shape,
    level: int = 0,
    variable_set: VariableSet | str = "adm",
    memory_order: str = "C",
) -> Patch:
    """Sample a reference spacetime onto a vertex-centred patch.

    Args:
        spacetime: any reference spacetime of this module (anything with a private
            ``_split(points)``; the public contract is the six classes).
        origin: (3,) position of node [0, 0, 0], units of M.
        spacing: (3,) node spacing > 0, units of M.
        shape: (nx, ny, nz), each >= 2.
        level: refinement level recorded on the patch.
        variable_set: "adm" or a conformal set (:class:`VariableSet`); lapse and shift_x/y/z
            are always included. Conformal fields: chi = det(gamma)^(-1/3),
            gamma_tilde = chi gamma, trace_K = gamma^ij K_ij,
            A_tilde = chi (K - gamma trace_K / 3), W = sqrt(chi), phi = -ln(chi) / 4.
        memory_order: "C" or "F"; "F" gives Fortran-ordered arrays with identical values.

    Returns:
        A :class:`Patch` whose fields are float64 arrays of shape ``shape`` indexed [i, j, k].
        Nodes at a singularity hold inf or NaN (not hidden; see the module docstring).
        Points are evaluated in chunks, so temporaries stay small on large grids.
    """
    vs = VariableSet.parse(variable_set)
    if memory_order not in ("C", "F"):
        raise SliceError(f"memory_order: expected 'C' or 'F', got {memory_order!r}")
    origin_arr = np.asarray(origin, dtype=float)
    spacing_arr = np.asarray(spacing, dtype=float)
    if origin_arr.shape != (3,) or not np.all(np.isfinite(origin_arr)):
        raise SliceError(f"origin: expected three finite numbers, got {origin!r}")
    if spacing_arr.shape != (3,) or not np.all(np.isfinite(spacing_arr)) or np.any(spacing_arr <= 0):
        raise SliceError(f"spacing: expected three finite numbers > 0, got {spacing!r}")
    try:
        shape_t = tuple(int(n) for n in shape)
    except (TypeError, ValueError):
        raise SliceError(f"shape: expected three integers, got {shape!r}") from None
    if len(shape_t) != 3 or min(shape_t) < 2:
        raise SliceError(f"shape: expected three integers >= 2, got {shape!r}")
    if not hasattr(spacetime, "_split"):
        raise TypeError(
            f"spacetime: expected a reference spacetime of this module, got {type(spacetime).__name__}"
        )

    # Walk the nodes in the declared memory order and write each chunk straight into the
    # output arrays through a flat view (no second full-size copy for Fortran order).
    total = int(np.prod(shape_t))
    arrays: dict[str, np.ndarray] = {}
    flat_views: dict[str, np.ndarray] = {}
    for start in range(0, total, _CHUNK_POINTS):
        stop = min(start + _CHUNK_POINTS, total)
        index = np.stack(np.unravel_index(np.arange(start, stop), shape_t, order=memory_order), axis=1)
        points = origin_arr + spacing_arr * index
        fields = _variable_set_fields(spacetime._split(points), vs)
        for name, values in fields.items():
            if name not in arrays:
                arrays[name] = np.empty(shape_t, order=memory_order)
                flat_views[name] = arrays[name].reshape(-1, order=memory_order)  # a view
            flat_views[name][start:stop] = values
    return Patch(
        origin=origin_arr,
        spacing=spacing_arr,
        shape=shape_t,
        level=level,
        fields=arrays,
        memory_order=memory_order,
    )


_BOX_KEYS = ("origin", "spacing", "shape", "level")


def _parse_box(box, index: int) -> dict:
    if isinstance(box, Mapping):
        unknown = set(box) - set(_BOX_KEYS)
        if unknown:
            raise SliceError(
                f"boxes[{index}]: unknown key(s) {sorted(unknown)}; expected {', '.join(_BOX_KEYS)}"
            )
        missing = [k for k in _BOX_KEYS[:3] if k not in box]
        if missing:
            raise SliceError(f"boxes[{index}]: missing key(s) {', '.join(missing)}")
        return {"level": 0, **dict(box)}
    if isinstance(box, Sequence) and len(box) in (3, 4):
        return dict(zip(_BOX_KEYS, box)) | ({} if len(box) == 4 else {"level": 0})
    raise SliceError(
        f"boxes[{index}]: expected a dict with keys origin, spacing, shape[, level] or a tuple "
        f"(origin, spacing, shape[, level]), got {box!r}"
    )


def sample_slice(
    spacetime: Spacetime,
    boxes: Sequence,
    *,
    variable_set: VariableSet | str = "adm",
    time: float = 0.0,
    iteration: int = 0,
    memory_order: str = "C",
) -> Slice:
    """Sample a reference spacetime onto several patches and wrap them in a :class:`Slice`.

    Args:
        boxes: sequence of dicts ``{"origin", "spacing", "shape"[, "level"]}`` or tuples
            ``(origin, spacing, shape[, level])``; level defaults to 0.
        variable_set, memory_order: as in :func:`sample_patch`.
        time, iteration: labels recorded on the slice. The data are always the spacetime's own
            t = 0 slice; for a boosted hole at a later time use
            :meth:`BoostedSchwarzschildKerrSchild.at_time`.
    """
    if isinstance(boxes, (Mapping, str, bytes)) or not isinstance(boxes, Sequence):
        raise SliceError("boxes: expected a sequence of boxes (dicts or tuples)")
    patches = []
    for index, box in enumerate(boxes):
        spec = _parse_box(box, index)
        patches.append(
            sample_patch(
                spacetime,
                origin=spec["origin"],
                spacing=spec["spacing"],
                shape=spec["shape"],
                level=spec["level"],
                variable_set=variable_set,
                memory_order=memory_order,
            )
        )
    return Slice(time=time, iteration=iteration, variable_set=VariableSet.parse(variable_set),
                 patches=tuple(patches))
