"""Star-shaped surfaces r = h(theta, phi) about a centre, h expanded in real spherical harmonics
(conventions, node grids and the factored sums over them: :mod:`.harmonics`, whose names are
re-exported here).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .harmonics import (  # noqa: F401  (re-exported: the numerics import them from here)
    AngularGrid,
    HarmonicBasis,
    _azimuthal,
    _degree_order,
    _project_columns,
    _synthesis_factors,
    angular_grid,
    basis_on_grid,
    coefficient_count,
    degree_of_index,
    expand_on_grid,
    harmonic_basis,
    harmonic_values,
    product_grid_basis,
    synthesize,
)

__all__ = [
    "coefficient_count",
    "degree_of_index",
    "HarmonicBasis",
    "harmonic_basis",
    "harmonic_values",
    "AngularGrid",
    "angular_grid",
    "basis_on_grid",
    "RadiusDerivatives",
    "Surface",
    "unit_vectors",
]


def unit_vectors(theta: np.ndarray, phi: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(N, 3) radial unit vector n, e_theta and e_phi at the given angles."""
    st, ct, sp, cp = np.sin(theta), np.cos(theta), np.sin(phi), np.cos(phi)
    n = np.stack([st * cp, st * sp, ct], axis=-1)
    e_t = np.stack([ct * cp, ct * sp, -st], axis=-1)
    e_p = np.stack([-sp, cp, np.zeros_like(sp)], axis=-1)
    return n, e_t, e_p


@dataclass(frozen=True, eq=False)
class RadiusDerivatives:
    """h and its angular derivatives at N directions (all (N,), units of M)."""

    theta: np.ndarray
    phi: np.ndarray
    h: np.ndarray
    h_t: np.ndarray
    h_p: np.ndarray
    h_tt: np.ndarray
    h_tp: np.ndarray
    h_pp: np.ndarray

    def replace(self, **changes: np.ndarray) -> "RadiusDerivatives":
        values = {k: getattr(self, k) for k in ("theta", "phi", "h", "h_t", "h_p", "h_tt", "h_tp", "h_pp")}
        values.update(changes)
        return RadiusDerivatives(**values)


@dataclass(frozen=True, eq=False)
class Surface:
    """A star-shaped surface x(theta, phi) = centre + h(theta, phi) n(theta, phi).

    Attributes:
        centre: (3,) coordinate centre, units of M.
        lmax: highest harmonic degree.
        coefficients: ((lmax + 1)^2,) real-harmonic coefficients of h, units of M.
    """

    centre: np.ndarray
    lmax: int
    coefficients: np.ndarray

    def __post_init__(self) -> None:
        centre = np.asarray(self.centre, dtype=float).reshape(3)
        coeffs = np.asarray(self.coefficients, dtype=float).ravel()
        if coeffs.size != coefficient_count(self.lmax):
            raise ValueError(
                f"coefficients: expected {coefficient_count(self.lmax)} values for lmax {self.lmax}, got {coeffs.size}"
            )
        centre = centre.copy()
        coeffs = coeffs.copy()
        centre.setflags(write=False)
        coeffs.setflags(write=False)
        object.__setattr__(self, "centre", centre)
        object.__setattr__(self, "coefficients", coeffs)
        object.__setattr__(self, "lmax", int(self.lmax))

    @classmethod
    def sphere(cls, centre, radius: float, lmax: int) -> "Surface":
        """A coordinate sphere of the given radius (units of M)."""
        if not radius > 0:
            raise ValueError(f"radius: expected a positive number, got {radius}")
        c = np.zeros(coefficient_count(lmax))
        c[0] = radius * np.sqrt(4.0 * np.pi)  # Y_00 = 1 / sqrt(4 pi)
        return cls(np.asarray(centre, dtype=float), lmax, c)

    @property
    def mean_radius(self) -> float:
        """Solid-angle mean of h (the l = 0 part), units of M."""
        return float(self.coefficients[0] / np.sqrt(4.0 * np.pi))

    def translated(self, new_centre) -> "Surface":
        """The same shape moved rigidly to ``new_centre``."""
        return Surface(np.asarray(new_centre, dtype=float), self.lmax, self.coefficients)

    def with_lmax(self, lmax: int) -> "Surface":
        """The same expansion truncated or zero-padded to ``lmax``."""
        c = np.zeros(coefficient_count(lmax))
        n = min(c.size, self.coefficients.size)
        c[:n] = self.coefficients[:n]
        return Surface(self.centre, lmax, c)

    def derivatives(self, basis: HarmonicBasis, theta: np.ndarray, phi: np.ndarray) -> RadiusDerivatives:
        """h and its angular derivatives where ``basis`` was evaluated."""
        if basis.lmax != self.lmax:
            raise ValueError(f"basis: built for lmax {basis.lmax}, surface has lmax {self.lmax}")
        a = self.coefficients
        return RadiusDerivatives(
            theta, phi, basis.Y @ a, basis.d_theta @ a, basis.d_phi @ a,
            basis.d_theta_theta @ a, basis.d_theta_phi @ a, basis.d_phi_phi @ a,
        )

    def on_grid(self, grid: AngularGrid) -> RadiusDerivatives:
        """h and its derivatives at the nodes of ``grid`` (factored over the product grid: the
        same sums as :meth:`derivatives` with ``grid.basis``, to round-off, read from tables a
        thirtieth of the basis matrices' size)."""
        if grid.lmax != self.lmax:
            raise ValueError(f"basis: built for lmax {grid.lmax}, surface has lmax {self.lmax}")
        return RadiusDerivatives(grid.theta, grid.phi, *synthesize(_synthesis_factors(grid), self.coefficients))

    def at(self, theta, phi) -> RadiusDerivatives:
        """h and its derivatives at arbitrary directions, e.g. along a curve."""
        theta = np.asarray(theta, dtype=float).ravel()
        phi = np.asarray(phi, dtype=float).ravel()
        return self.derivatives(harmonic_basis(self.lmax, theta, phi), theta, phi)

    def radius(self, theta, phi) -> np.ndarray:
        """h(theta, phi) at arbitrary directions (flattened), units of M."""
        return harmonic_values(self.lmax, theta, phi) @ self.coefficients

    def points(self, radius: RadiusDerivatives) -> np.ndarray:
        """(N, 3) coordinate positions of the surface at the directions of ``radius``."""
        n, _, _ = unit_vectors(radius.theta, radius.phi)
        return self.centre + radius.h[:, None] * n

    def top_degree_fraction(self) -> float:
        """Energy in degree ``lmax`` relative to the total (a surface-resolution indicator)."""
        a2 = self.coefficients**2
        total = float(a2.sum())
        if total == 0.0:
            return 0.0
        return float(a2[degree_of_index(self.lmax) == self.lmax].sum() / total)
