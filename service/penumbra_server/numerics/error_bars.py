"""Error estimates for every quantity quoted for a found horizon.

A horizon's numbers carry two kinds of numerical error the finder can see without a second
simulation:

(a) **surface truncation**: the surface is a harmonic expansion to degree l_max. The same surface
    truncated to a lower degree ``lower_lmax`` (default l_max - 2) is re-measured (not re-found);
    the change of each quantity, ``d_l``, measures the part of the shape the expansion is still
    adding near its top degrees.
(b) **interpolation of grid data**: a found surface solved Theta = 0 on interpolated data and is
    measured on interpolated data, so it is off the true horizon and its integrals are off too.
    Re-measuring the same surface at another order sees only the second effect; on Kerr and
    Brill-Lindquist grid data the first dominates the area, masses and circumferences (the
    re-measured difference missed the area's true error by factors of 10-100). So the surface is
    **re-found** at the next higher interpolation order, ``order + 2``, starting from itself (a
    few Newton steps: it is already close), and measured at that order; the difference ``d_o``
    to the quoted values is the order-``order`` error of both effects, since the higher order's
    own error is smaller by about (dx / r)^2. When the re-find does not converge, the same surface
    re-measured at ``order + 2`` is used and ``interpolation_check`` says so. At the highest
    supported order the comparison is with ``order - 2`` (then d_o overstates). On exact
    evaluators (no grid) d_o = 0.

The quoted error is ``safety_factor * sqrt(d_l^2 + d_o^2)`` (root-sum-square: the two sources
are independent) plus a round-off floor of ``1e-12`` times the quantity's scale (area: A; J:
M_chr^2; lengths and masses: the areal radius; chi, directions and multipoles: 1). A quantity
exactly 0 by construction (J and J_n where K_ij = 0) is quoted with that floor as its error.

The safety factor (default 4) is our choice, neither a published prescription nor tuned to one
case: on grid data of tilted, off-centre Kerr holes (a = 0.5, 0.9) and both holes of a
Brill-Lindquist pair at three resolutions each (tests/numerics/test_error_bars.py) the stated
error bounds the true error in >= 95 % of the cases and overstates it by more than a factor 30
in < 5 % of them; the overstatement is stated / max(true error, round-off floor), so a true
error at round-off (or exactly 0) counts as the floor. Figures: notes in the test's output and
README "How accurate are the numbers".

Directions are compared by angle (radians); vectors (centroid) by the length of the displacement.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .circumferences import axis_circumferences
from .finder import FinderSettings, find_surface
from .interpolation import SUPPORTED_ORDERS
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
        lmax, lower_lmax: degrees compared for (a); order, check_order: interpolation orders
            compared for (b) (check_order is None on exact data); interpolation_check: how (b)
            was made ("re-found at order 6", "re-measured at order 6 (...)", "exact data");
            safety_factor: as in the module docstring.
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
    check_order: int | None
    interpolation_check: str
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
    return measurement_of(spin, moments, circ)


def measurement_of(spin: HorizonSpin, moments, circ) -> dict:
    """What :func:`quote_horizon` compares, from a surface's spin, multipoles
    (``horizon_multipoles``) and spin-axis circumferences (``axis_circumferences``): a caller that
    measured those already at the quote's order, n_max and samples hands this as ``measured``."""
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


def _check_order(order: int) -> int:
    """The interpolation order compared with ``order``: the next higher one, or the next lower at
    the highest supported order."""
    higher = order + 2
    return higher if higher in SUPPORTED_ORDERS else order - 2


def _interpolation_comparison(surface: Surface, data: Slice, order: int, n_max: int, samples: int,
                              tolerance: float) -> tuple[dict, int, str]:
    """Measurements of the surface re-found (else re-measured) at the check order."""
    check = _check_order(order)
    try:
        found = find_surface(data, surface, settings=FinderSettings(lmax=surface.lmax, interpolation_order=check,
                                                                    tolerance=tolerance))
    except Exception as exc:  # the comparison must not lose the quote: fall back to re-measuring
        found, why = None, f"{type(exc).__name__}: {exc}"
    else:
        why = found.message
    if found is not None and found.success:
        return _measure(found.surface, data, check, n_max, samples), check, f"re-found at order {check}"
    return (_measure(surface, data, check, n_max, samples), check,
            f"re-measured at order {check} (the re-find did not converge: {why})")


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
    safety_factor: float = 4.0,
    samples: int = 128,
    tolerance: float = 1e-10,
    measured: dict | None = None,
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
        tolerance: expansion tolerance of the re-find at the check order (grid data).
        measured: the surface's own measurement at ``order`` (:func:`measurement_of`), when the
            caller has it; None: measured here.
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
    if grid and order not in SUPPORTED_ORDERS[1:]:
        raise ValueError(f"order: expected an interpolation order in {SUPPORTED_ORDERS[1:]} on grid data, got {order}")

    ref = _measure(surface, data, order, n_max, samples) if measured is None else measured
    truncated = _aligned(_measure(surface.with_lmax(low), data, order, n_max, samples), ref)
    if grid:
        other, check, how = _interpolation_comparison(surface, data, order, n_max, samples, tolerance)
        other = _aligned(other, ref)
    else:
        other, check, how = None, None, "exact data"

    quoted = {}
    for name in _QUANTITIES:
        d_l = _difference(name, ref[name], truncated[name])
        d_o = _difference(name, ref[name], other[name]) if other is not None else 0.0 * d_l
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
    return QuotedHorizon(**out, lmax=surface.lmax, lower_lmax=low, order=order, check_order=check,
                         interpolation_check=how, safety_factor=float(safety_factor), spin=ref["spin"])
