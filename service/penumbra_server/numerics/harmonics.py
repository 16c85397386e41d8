"""Real spherical harmonics, the angular node grids and sums over them.

Real harmonics (orthonormal on the unit sphere, no Condon-Shortley sign games needed since only
orthonormality matters here)::

    Y_l0      = P_l^0(theta)
    Y_lm      = sqrt(2) P_l^m(theta) cos(m phi)      m > 0
    Y_l,-m    = sqrt(2) P_l^m(theta) sin(m phi)      m > 0

with P_l^m the spherical (fully normalised) associated Legendre functions. Coefficient of
(l, m) sits at index ``l*l + l + m``.

Collocation and quadrature nodes: Gauss-Legendre in cos(theta) (no point on a pole) times a
uniform phi grid. With ``n_theta >= l_max + 1`` and ``n_phi >= 2 l_max + 1`` the quadrature is
exact for products of two harmonics of degree <= l_max. On such a product grid a harmonic is a
product of a theta factor and a phi factor, so fields are synthesised and projected ring by
ring and order by order (the factored sums below) rather than through (N, K) matrices.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from scipy.special import sph_legendre_p_all

__all__ = [
    "coefficient_count",
    "degree_of_index",
    "HarmonicBasis",
    "harmonic_basis",
    "harmonic_values",
    "product_grid_basis",
    "AngularGrid",
    "angular_grid",
    "basis_on_grid",
    "expand_on_grid",
    "expand_on_product",
    "synthesize",
]


def coefficient_count(lmax: int) -> int:
    """Number of real harmonic coefficients up to degree ``lmax``: (lmax + 1)^2."""
    return (lmax + 1) ** 2


@functools.lru_cache(maxsize=64)
def degree_of_index(lmax: int) -> np.ndarray:
    """(n_coef,) degree l of each coefficient index, read-only."""
    l = np.concatenate([np.full(2 * l + 1, l) for l in range(lmax + 1)])
    l.setflags(write=False)
    return l


@dataclass(frozen=True, eq=False)
class HarmonicBasis:
    """Real harmonics and their angular derivatives at N directions.

    Each matrix has shape (N, (lmax + 1)^2): ``Y``, ``d_theta``, ``d_phi``, ``d_theta_theta``,
    ``d_theta_phi``, ``d_phi_phi``.
    """

    lmax: int
    Y: np.ndarray
    d_theta: np.ndarray
    d_phi: np.ndarray
    d_theta_theta: np.ndarray
    d_theta_phi: np.ndarray
    d_phi_phi: np.ndarray


@functools.lru_cache(maxsize=64)
def _degree_order(lmax: int) -> tuple[np.ndarray, np.ndarray]:
    """(l, m) of every coefficient index, read-only."""
    l = degree_of_index(lmax)
    m = np.concatenate([np.arange(-d, d + 1) for d in range(lmax + 1)])
    m.setflags(write=False)
    return l, m


def _check_angles(lmax: int, theta, phi) -> tuple[np.ndarray, np.ndarray]:
    if lmax < 0:
        raise ValueError(f"lmax: expected an integer >= 0, got {lmax}")
    theta = np.asarray(theta, dtype=float).ravel()
    phi = np.asarray(phi, dtype=float).ravel()
    if theta.shape != phi.shape:
        raise ValueError(f"theta and phi: expected equal lengths, got {theta.shape} and {phi.shape}")
    return theta, phi


def _azimuthal(m: np.ndarray, phi: np.ndarray, derivative: int) -> np.ndarray:
    """(N, n_coef) the phi factor of each real harmonic (cos for m > 0, sin for m < 0, 1 for m = 0,
    times sqrt(2) off m = 0) differentiated ``derivative`` times."""
    am = np.abs(m)
    arg = phi[:, None] * am[None, :]
    if derivative == 0:
        f = np.where(m > 0, np.cos(arg), np.where(m < 0, np.sin(arg), 1.0))
    elif derivative == 1:
        f = np.where(m > 0, -am * np.sin(arg), np.where(m < 0, am * np.cos(arg), 0.0))
    else:
        f = -(am**2) * np.where(m > 0, np.cos(arg), np.where(m < 0, np.sin(arg), 0.0))
    return np.where(m == 0, 1.0, np.sqrt(2.0)) * f


def harmonic_basis(lmax: int, theta: np.ndarray, phi: np.ndarray) -> HarmonicBasis:
    """Real harmonics up to ``lmax`` and derivatives up to second order at (theta, phi) (radians).

    ``theta`` and ``phi`` are 1-D arrays of equal length N.
    """
    theta, phi = _check_angles(lmax, theta, phi)
    l, m = _degree_order(lmax)
    # p[d, l, m, n]: d-th theta derivative of the spherical Legendre function (m >= 0 used).
    p = sph_legendre_p_all(lmax, lmax, theta, diff_n=2)
    P, Pt, Ptt = (p[d][l, np.abs(m)].T for d in range(3))  # each (N, n_coef)
    f, fp, fpp = (_azimuthal(m, phi, d) for d in range(3))
    return HarmonicBasis(lmax, P * f, Pt * f, P * fp, Ptt * f, Pt * fp, P * fpp)


def product_grid_basis(lmax: int, theta_values: np.ndarray, phi_values: np.ndarray) -> HarmonicBasis:
    """:func:`harmonic_basis` at the product grid theta_values x phi_values (theta-major, N =
    n_theta n_phi), built from the 1-D factors: the same values, far more cheaply (the Legendre
    functions at n_theta angles, not at N points)."""
    th = np.asarray(theta_values, dtype=float).ravel()
    ph = np.asarray(phi_values, dtype=float).ravel()
    l, m = _degree_order(lmax)
    p = sph_legendre_p_all(lmax, lmax, th, diff_n=2)
    # Contiguous factors: the products are then C-ordered and the reshapes below copy nothing.
    P, Pt, Ptt = (np.ascontiguousarray(p[d][l, np.abs(m)].T)[:, None, :] for d in range(3))  # (n_theta, 1, n_coef)
    f, fp, fpp = (_azimuthal(m, ph, d)[None] for d in range(3))  # (1, n_phi, n_coef)
    n = th.size * ph.size

    def flat(a):
        return a.reshape(n, -1)

    return HarmonicBasis(lmax, flat(P * f), flat(Pt * f), flat(P * fp), flat(Ptt * f), flat(Pt * fp), flat(P * fpp))


def harmonic_values(lmax: int, theta: np.ndarray, phi: np.ndarray) -> np.ndarray:
    """(N, (lmax + 1)^2) real harmonics without derivatives (cheaper than :func:`harmonic_basis`)."""
    theta, phi = _check_angles(lmax, theta, phi)
    l, m = _degree_order(lmax)
    return sph_legendre_p_all(lmax, lmax, theta)[0][l, np.abs(m)].T * _azimuthal(m, phi, 0)


@dataclass(frozen=True, eq=False)
class AngularGrid:
    """Collocation/quadrature nodes: Gauss-Legendre in cos(theta) x uniform phi.

    Attributes:
        lmax: highest degree the grid is built for.
        theta, phi: (N,) node angles in radians, N = n_theta * n_phi, theta-major.
        weights: (N,) quadrature weights for integrals over solid angle (sum = 4 pi).
        basis: :class:`HarmonicBasis` at the nodes, built on first use (six (N, (lmax + 1)^2)
            arrays: a quadrature grid of degree 24 used for its nodes and weights alone would
            otherwise hold 175 MB of them).
    """

    lmax: int
    n_theta: int
    n_phi: int
    theta: np.ndarray
    phi: np.ndarray
    weights: np.ndarray

    @functools.cached_property
    def basis(self) -> HarmonicBasis:
        return product_grid_basis(self.lmax, self.theta[:: self.n_phi], self.phi[: self.n_phi])

    @property
    def size(self) -> int:
        return int(self.theta.size)

    def project(self, values: np.ndarray) -> np.ndarray:
        """Harmonic coefficients of nodal ``values`` (N,) by quadrature (factored over the
        product grid, :func:`_project_columns`)."""
        return _project_columns(self, np.asarray(values, dtype=float).reshape(self.size, 1))[:, 0]


@functools.lru_cache(maxsize=32)
def angular_grid(lmax: int, n_theta: int | None = None, n_phi: int | None = None) -> AngularGrid:
    """The node set for degree ``lmax`` (memoised: a pure function of its arguments).

    Defaults: n_theta = lmax + 2 and n_phi = 2 n_theta, a little above the exactness minimum so
    that the projection of the (nonlinear) expansion aliases less.
    """
    n_theta = int(n_theta or lmax + 2)
    n_phi = int(n_phi or 2 * n_theta)
    if n_theta < lmax + 1 or n_phi < 2 * lmax + 1:
        raise ValueError(
            f"angular grid: n_theta >= lmax + 1 and n_phi >= 2 lmax + 1 needed, got {n_theta}, {n_phi} for lmax {lmax}"
        )
    x, w = np.polynomial.legendre.leggauss(n_theta)
    th = np.arccos(x)[::-1]  # increasing theta
    w = w[::-1]
    ph = (np.arange(n_phi) + 0.5) * (2.0 * np.pi / n_phi)
    theta = np.repeat(th, n_phi)
    phi = np.tile(ph, n_theta)
    weights = np.repeat(w, n_phi) * (2.0 * np.pi / n_phi)
    for arr in (theta, phi, weights):
        arr.setflags(write=False)
    return AngularGrid(lmax, n_theta, n_phi, theta, phi, weights)


@functools.lru_cache(maxsize=32)
def basis_on_grid(lmax: int, grid_lmax: int) -> HarmonicBasis:
    """Harmonics up to ``lmax`` at the nodes of ``angular_grid(grid_lmax)`` (memoised: a pure
    function of its arguments; the finder's checks between nodes and the measurements reuse it)."""
    grid = angular_grid(grid_lmax)
    basis = product_grid_basis(lmax, grid.theta[:: grid.n_phi], grid.phi[: grid.n_phi])
    for name in ("Y", "d_theta", "d_phi", "d_theta_theta", "d_theta_phi", "d_phi_phi"):
        getattr(basis, name).setflags(write=False)
    return basis


#: (theta derivatives, phi derivatives) of each array of :class:`HarmonicBasis`, in its order.
_DERIVATIVE_ORDERS = ((0, 0), (1, 0), (0, 1), (2, 0), (1, 1), (0, 2))


def _factor_tables(lmax: int, theta: np.ndarray, phi: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The 1-D factors of the harmonics up to ``lmax`` on the product grid theta x phi: the polar
    factors (2 lmax + 1, 3 n_theta, lmax + 1), P_l^|m| and its first and second theta derivatives
    at the rings for each order m = -lmax..lmax (zero for l < |m|), the azimuthal factors
    (2 lmax + 1, 3 n_phi) and their first and second phi derivatives, and the slot of each
    coefficient (l, m) in the (m, l) table. Read-only."""
    n_theta = theta.size
    orders = np.arange(-lmax, lmax + 1)
    legendre = sph_legendre_p_all(lmax, lmax, theta, diff_n=2)  # [d, l, m >= 0, ring]
    polar = np.zeros((orders.size, 3, n_theta, lmax + 1))
    for row, m in enumerate(orders):
        polar[row, :, :, abs(m):] = np.moveaxis(legendre[:, abs(m):, abs(m)], 1, 2)
    polar = polar.reshape(orders.size, 3 * n_theta, lmax + 1)
    azimuthal = np.concatenate([_azimuthal(orders, phi, d).T for d in range(3)], axis=1)
    l, m = _degree_order(lmax)
    rows = (m + lmax) * (lmax + 1) + l
    for array in (polar, azimuthal, rows):
        array.setflags(write=False)
    return polar, azimuthal, rows


@functools.lru_cache(maxsize=16)
def _synthesis_factors(grid: AngularGrid) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_factor_tables` of ``grid`` at its own degree (for :meth:`Surface.on_grid`);
    memoised (a pure function of the grid, which :func:`angular_grid` memoises)."""
    return _factor_tables(grid.lmax, grid.theta[:: grid.n_phi], grid.phi[: grid.n_phi])


@functools.lru_cache(maxsize=32)
def _product_factors(lmax: int, theta_bytes: bytes, phi_bytes: bytes) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_factor_tables` for the float64 angles in ``theta_bytes`` x ``phi_bytes`` (memoised
    by value: callers rebuild equal angle arrays)."""
    return _factor_tables(lmax, np.frombuffer(theta_bytes), np.frombuffer(phi_bytes))


def synthesize(factors: tuple[np.ndarray, np.ndarray, np.ndarray], coefficients: np.ndarray) -> tuple[np.ndarray, ...]:
    """A field of real-harmonic ``coefficients`` ((K,) or (K, q)) and its five derivatives (the
    order of :class:`HarmonicBasis`) at the nodes of a product grid, each (N,) or (N, q), from
    the grid's :func:`_factor_tables`: sums over the degrees of each order at the rings, then
    over the orders at the meridians, never an (N, K) matrix. The same numbers as the basis
    matrices times the coefficients, to round-off."""
    polar, azimuthal, rows = factors
    orders, degrees = polar.shape[0], polar.shape[2]
    n_theta, n_phi = polar.shape[1] // 3, azimuthal.shape[1] // 3
    c = np.asarray(coefficients, dtype=float)
    flat = c.reshape(c.shape[0], -1)  # (K, q)
    table = np.zeros((orders * degrees, flat.shape[1]))
    table[rows] = flat
    # (m, [d, ring], q) sums over l of the d-th theta derivative of P_l^|m| times a_lm, then over
    # m against the azimuthal factors and their phi derivatives: [q, d, ring, e, phi].
    per_order = polar @ table.reshape(orders, degrees, -1)
    out = (per_order.transpose(2, 1, 0) @ azimuthal).reshape(-1, 3, n_theta, 3, n_phi)
    return tuple(out[:, d_theta, :, d_phi].reshape(out.shape[0], n_theta * n_phi).T.reshape((n_theta * n_phi,) + c.shape[1:])
                 for d_theta, d_phi in _DERIVATIVE_ORDERS)


def expand_on_grid(lmax: int, grid_lmax: int, coefficients: np.ndarray) -> tuple[np.ndarray, ...]:
    """:func:`expand_on_product` at the nodes of ``angular_grid(grid_lmax)``."""
    grid = angular_grid(grid_lmax)
    if lmax == grid_lmax:
        return synthesize(_synthesis_factors(grid), coefficients)
    return expand_on_product(lmax, grid.theta[:: grid.n_phi], grid.phi[: grid.n_phi], coefficients)


def expand_on_product(lmax: int, theta_values: np.ndarray, phi_values: np.ndarray,
                      coefficients: np.ndarray) -> tuple[np.ndarray, ...]:
    """A field of real-harmonic ``coefficients`` ((K,) or (K, q), K = (lmax + 1)^2) and its five
    derivatives (the order of :class:`HarmonicBasis`) at the product grid theta_values x
    phi_values (theta-major, N = n_theta n_phi), each (N,) or (N, q): :func:`synthesize` (the
    same numbers as :func:`product_grid_basis` times the coefficients, to round-off, several
    times fewer operations and memory reads)."""
    factors = _product_factors(lmax, np.ascontiguousarray(theta_values, dtype=float).tobytes(),
                               np.ascontiguousarray(phi_values, dtype=float).tobytes())
    return synthesize(factors, coefficients)


def _project_columns(grid: AngularGrid, values: np.ndarray) -> np.ndarray:
    """Y^T diag(weights) values for values (N, C) at the grid's nodes: the projection of C
    nodal functions, factored over the product grid (sum over phi per ring and azimuthal
    function, then over theta per degree): about a fifth of the multiply-adds of the dense
    (n_coef x N) product, same result to round-off."""
    azimuthal, polar, rows = _projection_factors(grid)
    count = values.shape[1]
    rings = values.reshape(grid.n_theta, grid.n_phi, count)
    per_ring = np.swapaxes(azimuthal @ rings, 0, 1)  # (2 lmax + 1, n_theta, C)
    return (polar @ per_ring).reshape(-1, count)[rows]


@functools.lru_cache(maxsize=16)
def _projection_factors(grid: AngularGrid) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For :func:`_project_columns`: the azimuthal factors (2 lmax + 1, n_phi) of the real
    harmonics at the grid's phi (m = -lmax..lmax), the polar factors times the quadrature
    weights (2 lmax + 1, lmax + 1, n_theta) (zero for l < |m|), and the row of each coefficient
    (l, m) in the (m, l) table. Read-only; memoised like :func:`_synthesis_factors`."""
    lmax, n_theta, n_phi = grid.lmax, grid.n_theta, grid.n_phi
    orders = np.arange(-lmax, lmax + 1)
    azimuthal = np.ascontiguousarray(_azimuthal(orders, grid.phi[:n_phi], 0).T)
    legendre = sph_legendre_p_all(lmax, lmax, grid.theta[::n_phi])[0]  # [l, m >= 0, ring]
    ring_weights = grid.weights[::n_phi]
    polar = np.zeros((orders.size, lmax + 1, n_theta))
    for row, m in enumerate(orders):
        polar[row, abs(m):] = legendre[abs(m):, abs(m)] * ring_weights
    l, m = _degree_order(lmax)
    rows = (m + lmax) * (lmax + 1) + l
    for array in (azimuthal, polar, rows):
        array.setflags(write=False)
    return azimuthal, polar, rows
