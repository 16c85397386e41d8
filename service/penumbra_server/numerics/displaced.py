"""Surfaces as a normal displacement from a reference surface: x = x_ref + h n_ref.

A star-shaped surface (:class:`.surfaces.Surface`) cannot describe a MOTS that folds back on
itself as seen from every centre (the inner common MOTS soon after a merger does). Here a surface
is parametrised by the angles (theta, phi) of the unit sphere, with no centre:

* the reference is a :class:`ReferenceSurface`: the three Cartesian coordinates x_ref(theta, phi)
  and a smooth unit-length displacement direction n_ref(theta, phi) (the flat outward normal of
  x_ref, band-limited), each expanded in the real harmonics of :mod:`.surfaces`;
* a :class:`DisplacedSurface` adds h(theta, phi) n_ref, h expanded in the same harmonics.

The Cartesian coordinates of a smooth embedded sphere are smooth functions on the sphere, so
their harmonic expansions converge fast; derivatives come from the basis-derivative matrices.
When |h| grows against the size of the reference the surface is made the new reference
(:func:`refreshed`): the displacement stays small and the parametrisation stays regular.

The expansion of any parametrised surface (:func:`parametric_expansion`): with tangents
e_a = d_a x, the outward unit normal s_i proportional to eps_ijk e_theta^j e_phi^k, induced
metric q_ab = gamma_ij e_a^i e_b^j and k_ab = -s_j (d_a d_b x^j + Gamma^j_ik e_a^i e_b^k)
(from s_j e_b^j = 0 along the surface),

    Theta = q^ab k_ab - K + K_ij s^i s^j.

Units: coordinates and h in M, Theta in 1/M.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .geometry import PointGeometry, inverse_3x3
from .harmonics import expand_on_product
from .surfaces import (Surface, angular_grid, basis_on_grid, coefficient_count, expand_on_grid, harmonic_basis,
                       harmonic_values)

__all__ = [
    "ReferenceSurface",
    "DisplacedSurface",
    "Embedding",
    "ParametricTerms",
    "reference_from_star",
    "reference_from_points",
    "embedding",
    "embedding_at",
    "embedding_on_product_grid",
    "parametric_expansion",
    "parametric_area",
    "CoordinateExtent",
    "coordinate_extent",
    "refreshed",
    "star_shaped_form",
    "displacement_size",
]


def _frozen(values) -> np.ndarray:
    out = np.array(values, dtype=float)
    out.setflags(write=False)
    return out


@dataclass(frozen=True, eq=False)
class ReferenceSurface:
    """x_ref and n_ref as real-harmonic expansions up to ``lmax``.

    Attributes:
        lmax: highest degree.
        position: ((lmax + 1)^2, 3) coefficients of the Cartesian coordinates (M).
        direction: ((lmax + 1)^2, 3) coefficients of the displacement direction (unit length at
            the nodes up to truncation; dimensionless).
    """

    lmax: int
    position: np.ndarray
    direction: np.ndarray

    def __post_init__(self) -> None:
        n = coefficient_count(self.lmax)
        for name in ("position", "direction"):
            value = np.asarray(getattr(self, name), dtype=float)
            if value.shape != (n, 3):
                raise ValueError(f"{name}: expected shape ({n}, 3) for lmax {self.lmax}, got {value.shape}")
            object.__setattr__(self, name, _frozen(value))


@dataclass(frozen=True, eq=False)
class DisplacedSurface:
    """x = x_ref + h n_ref with h's real-harmonic coefficients ((lmax + 1)^2,) in M."""

    reference: ReferenceSurface
    lmax: int
    coefficients: np.ndarray

    def __post_init__(self) -> None:
        coeffs = np.asarray(self.coefficients, dtype=float).ravel()
        if coeffs.size != coefficient_count(self.lmax):
            raise ValueError(f"coefficients: expected {coefficient_count(self.lmax)} values for lmax {self.lmax}, got {coeffs.size}")
        object.__setattr__(self, "coefficients", _frozen(coeffs))

    @classmethod
    def at_reference(cls, reference: ReferenceSurface, lmax: int, offset: float = 0.0) -> "DisplacedSurface":
        """The reference itself, or moved by a uniform ``offset`` (M) along n_ref."""
        c = np.zeros(coefficient_count(lmax))
        c[0] = offset * np.sqrt(4.0 * np.pi)
        return cls(reference, lmax, c)

    def grid_lmax(self) -> int:
        """Degree of the node set that resolves both h and the reference."""
        return max(self.lmax, self.reference.lmax)


@dataclass(frozen=True, eq=False)
class Embedding:
    """Points and parameter derivatives of a parametrised surface at N nodes (all (N, 3), M).

    ``x_a`` / ``x_ab`` hold d_theta, d_phi and the three second derivatives (tt, tp, pp)."""

    theta: np.ndarray
    phi: np.ndarray
    x: np.ndarray
    x_t: np.ndarray
    x_p: np.ndarray
    x_tt: np.ndarray
    x_tp: np.ndarray
    x_pp: np.ndarray


def _expand(basis, coefficients: np.ndarray) -> tuple[np.ndarray, ...]:
    return tuple(getattr(basis, name) @ coefficients for name in ("Y", "d_theta", "d_phi", "d_theta_theta", "d_theta_phi", "d_phi_phi"))


def _local_values(surface: DisplacedSurface, grid_lmax: int, reference_values=None,
                  ) -> tuple[tuple[np.ndarray, ...], tuple[np.ndarray, ...], tuple[np.ndarray, ...]]:
    """(h and derivatives, x_ref and derivatives, n_ref and derivatives) at the grid's nodes.
    Summed over the product grid's factors (:func:`~.surfaces.expand_on_grid`).
    ``reference_values``: a callable like :func:`reference_on_grid` (e.g. one that remembers the
    reference of a find's iterations); default :func:`reference_on_grid`."""
    h = expand_on_grid(surface.lmax, grid_lmax, surface.coefficients)
    xr, nr = (reference_values or reference_on_grid)(surface.reference, grid_lmax)
    return h, xr, nr


def reference_on_grid(reference: ReferenceSurface, grid_lmax: int) -> tuple[tuple[np.ndarray, ...], tuple[np.ndarray, ...]]:
    """(x_ref and derivatives, n_ref and derivatives), each (N, 3), at the nodes of
    ``angular_grid(grid_lmax)`` (one expansion for both)."""
    both = expand_on_grid(reference.lmax, grid_lmax, np.concatenate([reference.position, reference.direction], axis=1))
    return tuple(v[:, :3] for v in both), tuple(v[:, 3:] for v in both)


def combine(theta, phi, h, xr, nr) -> Embedding:
    """The embedding of x_ref + h n_ref from the local values (h, h_t, h_p, h_tt, h_tp, h_pp),
    x_ref's and n_ref's values and derivatives in the same order (product rule)."""
    hv, ht, hp, htt, htp, hpp = (v[:, None] for v in h)
    x, xt, xp, xtt, xtp, xpp = xr
    n, nt, np_, ntt, ntp, npp = nr
    return Embedding(
        theta, phi,
        x + hv * n,
        xt + ht * n + hv * nt,
        xp + hp * n + hv * np_,
        xtt + htt * n + 2 * ht * nt + hv * ntt,
        xtp + htp * n + ht * np_ + hp * nt + hv * ntp,
        xpp + hpp * n + 2 * hp * np_ + hv * npp,
    )


def embedding_at(surface: DisplacedSurface, theta, phi) -> Embedding:
    """The embedding at arbitrary parameter angles (1-D arrays, radians), e.g. quadrature nodes."""
    theta = np.asarray(theta, dtype=float).ravel()
    phi = np.asarray(phi, dtype=float).ravel()
    hb, rb = harmonic_basis(surface.lmax, theta, phi), harmonic_basis(surface.reference.lmax, theta, phi)
    return combine(theta, phi, _expand(hb, surface.coefficients), _expand(rb, surface.reference.position),
                   _expand(rb, surface.reference.direction))


def embedding_on_product_grid(surface: DisplacedSurface, grid) -> Embedding:
    """:func:`embedding_at` the nodes of an :class:`~.harmonics.AngularGrid` (any degree and
    node counts, e.g. a quadrature grid), summed over the grid's 1-D factors (the same numbers to
    round-off, far more cheaply)."""
    th, ph = grid.theta[:: grid.n_phi], grid.phi[: grid.n_phi]
    reference = surface.reference
    both = expand_on_product(reference.lmax, th, ph, np.concatenate([reference.position, reference.direction], axis=1))
    return combine(grid.theta, grid.phi, expand_on_product(surface.lmax, th, ph, surface.coefficients),
                   tuple(v[:, :3] for v in both), tuple(v[:, 3:] for v in both))


def embedding(surface: DisplacedSurface, grid_lmax: int | None = None) -> Embedding:
    """The embedding at the nodes of ``angular_grid(grid_lmax)`` (default: the surface's)."""
    grid_lmax = surface.grid_lmax() if grid_lmax is None else grid_lmax
    grid = angular_grid(grid_lmax)
    h, xr, nr = _local_values(surface, grid_lmax)
    return combine(grid.theta, grid.phi, h, xr, nr)


@dataclass(frozen=True, eq=False)
class ParametricTerms:
    """Theta (N,) in 1/M, outward unit normal s_i (N, 3) and the area density sqrt(det q) (N,)
    in M^2 per unit d theta d phi."""

    theta: np.ndarray
    normal_down: np.ndarray
    area_density: np.ndarray


def parametric_expansion(emb: Embedding, geometry: PointGeometry) -> ParametricTerms:
    """Outgoing expansion at the points of ``emb`` (geometry given there, same order).

    Contractions of three tensors are done as batched matrix products and two-operand einsums:
    numpy's einsum over three operands loops over every index combination (about three times
    slower here; same values to round-off)."""
    g, dg, K = geometry.gamma, geometry.dgamma, geometry.K
    ginv = inverse_3x3(g)
    s = np.cross(emb.x_t, emb.x_p)  # covector normal: its contraction with both tangents vanishes
    s_up = np.einsum("nij,nj->ni", ginv, s)
    with np.errstate(invalid="ignore"):
        norm = np.sqrt(np.einsum("ni,ni->n", s, s_up))
    s, s_up = s / norm[:, None], s_up / norm[:, None]
    tangents = np.stack([emb.x_t, emb.x_p], axis=1)  # (N, 2, 3)
    tangents_t = np.swapaxes(tangents, 1, 2)
    q = np.matmul(np.matmul(tangents, g), tangents_t)  # q_ab = x_a^i gamma_ij x_b^j
    det = q[:, 0, 0] * q[:, 1, 1] - q[:, 0, 1] ** 2
    q_inv = np.stack([np.stack([q[:, 1, 1], -q[:, 0, 1]], -1), np.stack([-q[:, 0, 1], q[:, 0, 0]], -1)], 1) / det[:, None, None]
    # s^l Gamma_lik = (s^l d_i gamma_lk + s^l d_k gamma_li - s^l d_l gamma_ik) / 2, dg[n, a, b, c] = d_a gamma_bc
    along = np.matmul(s_up[:, None, None, :], dg)[:, :, 0, :]  # [n, i, k] = s^l d_i gamma_lk
    s_gamma = 0.5 * (along + np.swapaxes(along, 1, 2) - np.einsum("nl,nlik->nik", s_up, dg))
    # minus the extrinsic curvature of the surface: s_j x_ab^j + s_j Gamma^j_ik x_a^i x_b^k
    minus_k = np.matmul(np.matmul(tangents, s_gamma), tangents_t)
    minus_k[:, 0, 0] += np.einsum("ni,ni->n", s, emb.x_tt)
    mixed = np.einsum("ni,ni->n", s, emb.x_tp)
    minus_k[:, 0, 1] += mixed
    minus_k[:, 1, 0] += mixed
    minus_k[:, 1, 1] += np.einsum("ni,ni->n", s, emb.x_pp)
    trace_K = np.einsum("nij,nij->n", ginv, K)
    Kss = np.einsum("ni,ni->n", np.einsum("nij,nj->ni", K, s_up), s_up)
    theta = -np.einsum("nab,nab->n", q_inv, minus_k) - trace_K + Kss
    with np.errstate(invalid="ignore"):
        density = np.sqrt(det)
    return ParametricTerms(theta, s, density)


def parametric_area(surface: DisplacedSurface, geometry_source) -> float:
    """Proper area (M^2); ``geometry_source``: points (N, 3) -> :class:`PointGeometry`."""
    grid = angular_grid(surface.grid_lmax() + 2)
    emb = embedding(surface, grid.lmax)
    terms = parametric_expansion(emb, geometry_source(emb.x))
    # grid weights integrate over solid angle (sin theta d theta d phi)
    return float(np.sum(grid.weights * terms.area_density / np.sin(grid.theta)))


@dataclass(frozen=True)
class CoordinateExtent:
    """Coordinate centroid (3,) weighted by proper area, and the least, mean (over proper area)
    and largest coordinate distance of the surface from it; all in M."""

    centroid: tuple[float, float, float]
    radius_min: float
    radius_mean: float
    radius_max: float


def coordinate_extent(surface: DisplacedSurface, geometry_source) -> CoordinateExtent:
    """Where the surface sits and how large it is (no centre of expansion needed)."""
    grid = angular_grid(surface.grid_lmax() + 2)
    emb = embedding(surface, grid.lmax)
    weight = grid.weights * parametric_expansion(emb, geometry_source(emb.x)).area_density / np.sin(grid.theta)
    centroid = np.sum(weight[:, None] * emb.x, axis=0) / np.sum(weight)
    distance = np.linalg.norm(emb.x - centroid, axis=1)
    return CoordinateExtent(tuple(float(v) for v in centroid), float(distance.min()),
                            float(np.sum(weight * distance) / np.sum(weight)), float(distance.max()))


def _flat_normal(x_t: np.ndarray, x_p: np.ndarray) -> np.ndarray:
    n = np.cross(x_t, x_p)
    return n / np.linalg.norm(n, axis=1)[:, None]


def reference_from_points(positions, lmax: int) -> ReferenceSurface:
    """Reference from Cartesian positions (N, 3) at the nodes of ``angular_grid(lmax)``:
    projected onto the harmonics, the direction is the flat unit normal, projected too."""
    grid = angular_grid(lmax)
    positions = np.asarray(positions, dtype=float)
    if positions.shape != (grid.size, 3):
        raise ValueError(f"positions: expected shape ({grid.size}, 3) (the nodes of lmax {lmax}), got {positions.shape}")
    coeffs = grid.basis.Y.T @ (grid.weights[:, None] * positions)
    normal = _flat_normal(grid.basis.d_theta @ coeffs, grid.basis.d_phi @ coeffs)
    return ReferenceSurface(lmax, coeffs, grid.basis.Y.T @ (grid.weights[:, None] * normal))


def reference_from_star(surface: Surface, lmax: int | None = None) -> ReferenceSurface:
    """A star-shaped surface as a reference (degree ``lmax``, default the surface's + 2 so that
    h times the radial unit vector is represented exactly)."""
    lmax = surface.lmax + 2 if lmax is None else lmax
    grid = angular_grid(lmax)
    rd = surface.derivatives(basis_on_grid(surface.lmax, lmax), grid.theta, grid.phi)
    return reference_from_points(surface.points(rd), lmax)


def refreshed(surface: DisplacedSurface) -> DisplacedSurface:
    """The same surface as a zero displacement from itself (a new reference of the same degree)."""
    lmax = surface.reference.lmax
    emb = embedding(surface, lmax)
    return DisplacedSurface.at_reference(reference_from_points(emb.x, lmax), surface.lmax)


def displacement_size(surface: DisplacedSurface) -> float:
    """max |h| over the reference's mean coordinate radius about its centroid (dimensionless)."""
    grid = angular_grid(surface.grid_lmax())
    h, xr, _ = _local_values(surface, grid.lmax)
    centroid = np.sum(grid.weights[:, None] * xr[0], axis=0) / (4 * np.pi)
    size = float(np.sum(grid.weights * np.linalg.norm(xr[0] - centroid, axis=1)) / (4 * np.pi))
    return float(np.max(np.abs(h[0])) / size)


def star_shaped_form(surface: DisplacedSurface, lmax: int, centre=None, *, margin: float = 0.05,
                     candidates=(), max_misfit: float = np.inf) -> Surface | None:
    """The surface as r = h(theta, phi) about ``centre`` (default: its coordinate centroid), or
    None when it is not star-shaped there: some flat normal makes an angle with the radial
    direction whose cosine is below ``margin``. The radius is a least-squares harmonic fit of
    degree ``lmax`` to a dense sample of the surface. With ``candidates`` (points (3,)) the centre
    among them and ``centre`` whose fit misses the sample least (rms) is used; None also when
    that rms misfit exceeds ``max_misfit`` times the fit's mean radius."""
    grid = angular_grid(max(surface.grid_lmax(), lmax) + 2)
    emb = embedding(surface, grid.lmax)
    if centre is None:
        area = np.linalg.norm(np.cross(emb.x_t, emb.x_p), axis=1) / np.sin(grid.theta)
        centre = np.sum((grid.weights * area)[:, None] * emb.x, axis=0) / np.sum(grid.weights * area)
    best, best_misfit = None, np.inf
    for point in (centre, *candidates):
        fit = _star_fit(emb, grid.weights, lmax, np.asarray(point, dtype=float).reshape(3), margin)
        if fit is not None and fit[1] < best_misfit:
            best, best_misfit = fit
    if best is not None and best_misfit > max_misfit * best.mean_radius:
        return None
    return best


def _star_fit(emb: Embedding, weights: np.ndarray, lmax: int, centre: np.ndarray, margin: float):
    """(star-shaped fit about ``centre``, rms radius misfit in M) or None when not star-shaped."""
    rel = emb.x - centre
    radius = np.linalg.norm(rel, axis=1)
    if np.min(radius) <= 0:
        return None
    radial = rel / radius[:, None]
    if np.min(np.einsum("ni,ni->n", radial, _flat_normal(emb.x_t, emb.x_p))) < margin:
        return None
    theta = np.arccos(np.clip(radial[:, 2], -1.0, 1.0))
    phi = np.mod(np.arctan2(radial[:, 1], radial[:, 0]), 2 * np.pi)
    design = harmonic_values(lmax, theta, phi) * np.sqrt(weights)[:, None]
    rhs = radius * np.sqrt(weights)
    coeffs = np.linalg.lstsq(design, rhs, rcond=None)[0]
    misfit = float(np.linalg.norm(design @ coeffs - rhs) / np.sqrt(4 * np.pi))
    return Surface(centre, lmax, coeffs), misfit
