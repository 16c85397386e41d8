"""Error estimates for every quantity quoted for a found horizon.

A horizon's numbers carry two kinds of numerical error the finder can see without a second
simulation:

(a) **surface truncation**: the surface is a harmonic expansion to degree l_max. The same surface
    truncated to a lower degree ``lower_lmax`` (default l_max - 2) is re-measured (not re-found);
    the change of each quantity, ``d_l``, measures the part of the shape the expansion is still
    adding near its top degrees.
(b) **interpolation of grid data**: the same surface is re-measured with the interpolation order
    lowered by 2 (``interpolation.grid_geometry(order=...)``: order 4 -> 2 means cubic -> linear
    Lagrange with second- instead of fourth-order differences). The change ``d_o`` is the
    interpolation error of the *lower* order. Re-measuring cannot see the other effect of
    interpolation, the found surface sitting slightly off the true horizon (it solved
    Theta = 0 on interpolated data), which dominates the centroid and the higher multipoles.
    As a compromise between the two we scale ``d_o`` by one power of dx / r (dx the finest
    spacing serving the surface, r its mean coordinate radius; capped at 1): a measured error of
    order p is about (dx / r)^2 d_o, a displaced surface shifts shape-sensitive quantities by
    more. On exact evaluators (no grid) d_o = 0.

The quoted error is ``safety_factor * sqrt(d_l^2 + ((dx / r) d_o)^2)`` (root-sum-square: the two
sources are independent) plus a round-off floor of ``1e-12`` times the quantity's scale. The
safety factor (default 10) and the scaling are our choice, calibrated on Kerr and Brill-Lindquist
grid data with known answers and checked on other configurations in
tests/numerics/test_error_bars.py (figures in README.md, "How accurate the numbers are"); neither is a published
prescription. The bars are deliberately conservative for integrated quantities (area, masses,
circumferences: typically 10-100 times the true error) so that they still cover the
shape-sensitive ones (centroid, direction, multipoles) in about 95 % of cases.

Directions are compared by angle (radians); vectors (centroid) component-wise.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .circumferences import axis_circumferences
from .killing import HorizonSpin, horizon_spin
from .multipoles import horizon_multipoles
from .slices import Slice
from .surfaces import Surface

__all__ = ["Quoted", "QuotedHorizon", "quote_horizon", "direction_angle"]

#: Relative round-off floor added to every error (dimensionless, times the quantity's scale).
_ROUND_OFF = 1e-12


@dataclass(frozen=True, eq=False)
class Quoted:
    """A value and its error estimate (same units and shape as the value; for a direction the
    error is an angle in radians and ``value`` is a (3,) unit vector)."""

    value: float | np.ndarray
    error: float | np.ndarray


@dataclass(frozen=True, eq=False)
class QuotedHorizon:
    """Every quoted quantity of one horizon with its error.

    Attributes:
        area (M^2), irreducible_mass, christodoulou_mass (M), angular_momentum (J >= 0, M^2),
        dimensionless_spin (chi = J / M_chr^2): scalars.
        spin_direction: (3,) unit vector; error is an angle (radians), pi when J is not
            distinguishable from 0 (J <= its error).
        centroid: (3,) area-weighted coordinate position (M), error per component.
        mass_multipoles, spin_multipoles: (n_max + 1,) dimensionless M_n / M^(n+1), J_n / M^(n+1).
        equatorial_circumference, polar_circumference: proper lengths (M) in planes set by the
            spin axis through the centroid (polar: mean of the two meridians); NaN when a cut is
            not star-shaped about the centroid.
        lmax, lower_lmax: degrees compared for (a); order, lower_order: interpolation orders
            compared for (b) (lower_order is None on exact data); order_scale: the factor applied
            to the order difference; safety_factor: as in the module docstring.
        spin: the full :class:`HorizonSpin` at (lmax, order) (eigenvalues, AKV coefficients).
    """

    area: Quoted
    irreducible_mass: Quoted
    christodoulou_mass: Quoted
    angular_momentum: Quoted
    dimensionless_spin: Quoted
    spin_direction: Quoted
    centroid: Quoted
    mass_multipoles: Quoted
    spin_multipoles: Quoted
    equatorial_circumference: Quoted
    polar_circumference: Quoted
    lmax: int
    lower_lmax: int
    order: int
    lower_order: int | None
    order_scale: float
    safety_factor: float
    spin: HorizonSpin


def direction_angle(u: np.ndarray, v: np.ndarray) -> float:
    """Angle (radians) between two non-zero 3-vectors, in [0, pi]."""
    u, v = np.asarray(u, dtype=float), np.asarray(v, dtype=float)
    # atan2 of |u x v| and u . v keeps full precision near 0 and pi, unlike arccos.
    return float(np.arctan2(np.linalg.norm(np.cross(u, v)), float(u @ v)))


def _measure(surface: Surface, data, order: int, n_max: int, samples: int) -> dict:
    spin = horizon_spin(surface, data, order=order)
    moments = horizon_multipoles(surface, data, n_max=n_max, spin=spin, order=order)
    circ = axis_circumferences(surface, data, spin.direction, spin.centroid, samples=samples, order=order)
    return dict(
        spin=spin,
        area=spin.area,
        irreducible_mass=spin.irreducible_mass,
        christodoulou_mass=spin.christodoulou_mass,
        angular_momentum=spin.angular_momentum,
        dimensionless_spin=spin.dimensionless_spin,
        spin_direction=np.asarray(spin.direction),
        centroid=np.asarray(spin.centroid),
        mass_multipoles=np.asarray(moments.mass_moments_dimensionless),
        spin_multipoles=np.asarray(moments.spin_moments_dimensionless),
        equatorial_circumference=circ.equatorial,
        polar_circumference=float(np.mean(circ.polar)),
    )


def _aligned(other: dict, ref: dict) -> dict:
    """``other`` with the potential's orientation of ``ref``: when J ~ 0 the sign of zeta is
    arbitrary, and flipping it flips the direction and multiplies M_n and J_n by (-1)^n."""
    if float(other["spin_direction"] @ ref["spin_direction"]) >= 0:
        return other
    sign = (-1.0) ** np.arange(len(other["mass_multipoles"]))
    return dict(other, spin_direction=-other["spin_direction"], mass_multipoles=sign * other["mass_multipoles"],
                spin_multipoles=sign * other["spin_multipoles"])


def _finest_spacing(data: Slice, surface: Surface) -> float:
    """Smallest spacing among the patches whose boxes contain the surface's centre (M); the
    finest level serving the surface in a mesh-refined slice."""
    best = np.inf
    for patch in data.patches:
        lo = patch.origin
        hi = patch.origin + patch.spacing * (np.asarray(patch.shape) - 1)
        if np.all(surface.centre >= lo) and np.all(surface.centre <= hi):
            best = min(best, float(np.max(patch.spacing)))
    if not np.isfinite(best):
        best = min(float(np.max(p.spacing)) for p in data.patches)
    return best


def _difference(name: str, a, b):
    if name == "spin_direction":
        return direction_angle(a, b)
    if name == "centroid":  # one error for the position: the length of the displacement
        return np.full(3, np.linalg.norm(np.asarray(a, dtype=float) - np.asarray(b, dtype=float)))
    return np.abs(np.asarray(a, dtype=float) - np.asarray(b, dtype=float))


def _scale(name: str, ref: dict) -> float:
    """Magnitude used for the round-off floor."""
    if name in ("spin_direction", "dimensionless_spin", "mass_multipoles", "spin_multipoles"):
        return 1.0
    if name in ("area",):
        return ref["area"]
    if name == "angular_momentum":
        return ref["christodoulou_mass"] ** 2
    return float(np.sqrt(ref["area"] / (4 * np.pi)))  # lengths and masses: the areal radius


_QUANTITIES = (
    "area", "irreducible_mass", "christodoulou_mass", "angular_momentum", "dimensionless_spin",
    "spin_direction", "centroid", "mass_multipoles", "spin_multipoles",
    "equatorial_circumference", "polar_circumference",
)


def quote_horizon(
    surface: Surface,
    data,
    *,
    order: int = 4,
    lower_lmax: int | None = None,
    n_max: int = 8,
    safety_factor: float = 10.0,
    samples: int = 128,
) -> QuotedHorizon:
    """Quantities of a found ``surface`` in ``data`` with error estimates (module docstring).

    Args:
        surface: the found horizon (l_max >= 3).
        data: what the finder used: a :class:`Slice` (grid data), a reference spacetime or a
            callable geometry source (exact: no interpolation error).
        order: interpolation order the finder used (``FinderSettings.interpolation_order``).
        lower_lmax: degree of the truncated surface (default l_max - 2, at least 1).
        n_max: highest multipole.
        safety_factor: multiplies the root-sum-square of the two differences (>= 1).
        samples: points per circumference cut.
    """
    if not isinstance(surface, Surface):
        raise TypeError(f"surface: expected a Surface, got {type(surface).__name__}")
    if surface.lmax < 3:
        raise ValueError(f"surface: expected l_max >= 3 to compare with a lower degree, got {surface.lmax}")
    low = surface.lmax - 2 if lower_lmax is None else int(lower_lmax)
    if not 1 <= low < surface.lmax:
        raise ValueError(f"lower_lmax: expected an integer in [1, {surface.lmax - 1}], got {lower_lmax}")
    if not safety_factor >= 1:
        raise ValueError(f"safety_factor: expected a number >= 1, got {safety_factor}")
    grid = isinstance(data, Slice)
    if grid and order - 2 < 2:
        raise ValueError(f"order: expected an interpolation order >= 4 on grid data (it is compared with order - 2), got {order}")

    ref = _measure(surface, data, order, n_max, samples)
    truncated = _aligned(_measure(surface.with_lmax(low), data, order, n_max, samples), ref)
    if grid:
        coarse = _aligned(_measure(surface, data, order - 2, n_max, samples), ref)
        order_scale = min(1.0, _finest_spacing(data, surface) / surface.mean_radius)
    else:
        coarse, order_scale = None, 0.0

    quoted = {}
    for name in _QUANTITIES:
        d_l = _difference(name, ref[name], truncated[name])
        d_o = order_scale * _difference(name, ref[name], coarse[name]) if coarse is not None else 0.0 * d_l
        err = safety_factor * np.sqrt(np.square(d_l) + np.square(d_o)) + _ROUND_OFF * _scale(name, ref)
        quoted[name] = err
    if not ref["angular_momentum"] > quoted["angular_momentum"]:
        quoted["spin_direction"] = np.pi  # J indistinguishable from 0: no direction
    out = {}
    for name in _QUANTITIES:
        value, err = ref[name], quoted[name]
        if np.ndim(value):
            value = np.array(value, dtype=float)
            err = np.broadcast_to(np.asarray(err, dtype=float), value.shape).copy() if name != "spin_direction" else float(err)
            value.setflags(write=False)
            if isinstance(err, np.ndarray):
                err.setflags(write=False)
        else:
            value, err = float(value), float(err)
        out[name] = Quoted(value, err)
    return QuotedHorizon(**out, lmax=surface.lmax, lower_lmax=low, order=order,
                         lower_order=order - 2 if grid else None, order_scale=order_scale,
                         safety_factor=float(safety_factor), spin=ref["spin"])
