"""When to look for a common apparent horizon, and where to start looking.

Units: geometric (G = c = 1), lengths in the run's mass scale M.

Criterion: search for a common surface when the smallest forecast coordinate separation d of
the two bodies over the interval satisfies d < ``factor`` x (r_A + r_B), with r_A, r_B the
horizons' largest coordinate radii.

Why ``factor`` = 3 by default: for two equal Brill-Lindquist masses m a common horizon exists
below a coordinate separation of about 1.53 m (Cadez, Ann. Phys. 83, 449 (1974); Bishop,
GRG 14, 717 (1982); docs/references.md item 7, values from memory there), while each individual
horizon has a coordinate radius close to m/2 (its isotropic Schwarzschild value, docs/references.md
item 7), so d / (r_A + r_B) is about 1.5 when the common horizon forms. Evolved slices in
moving-puncture gauges have other coordinate radii and separations than initial data, and the
forecast separation carries an error, so the search starts at twice that ratio: it costs one
extra surface search per slice during the last stretch of the approach, while starting late
would miss the first time the common horizon exists. Once a search has started it continues
every slice (``already_searching``) until the caller reports the common surface found.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

__all__ = [
    "CommonWatchError",
    "CommonSearchAdvice",
    "common_surface_guess",
    "common_neck_point",
    "common_horizon_watch",
    "DEFAULT_COMMON_FACTOR",
]

#: Default separation / (r_A + r_B) below which a common surface is searched for (see module doc).
DEFAULT_COMMON_FACTOR = 3.0


class CommonWatchError(ValueError):
    """Bad input to the common-horizon watch. The message names the field at fault."""


@dataclass(frozen=True, eq=False)
class CommonSearchAdvice:
    """Whether to search for a common surface, and the initial guess for it.

    Attributes:
        search: True when the common surface should be searched for in the next slice.
        closest_separation: smallest coordinate separation of the bodies over the given
            positions, units of M.
        closest_index: row of the given positions where it occurs.
        radius_sum: r_A + r_B (largest coordinate radii), units of M.
        separation_ratio: closest_separation / radius_sum.
        factor: the threshold the ratio was compared with.
        centre: (3,) guess centre: the pair's neck (:func:`common_neck_point`) at the first row.
        radius: guess radius (units of M): the sphere about ``centre`` enclosing both horizons'
            spheres at the first row, times the enclosure factor.
        reason: a sentence stating the comparison made.
    """

    search: bool
    closest_separation: float
    closest_index: int
    radius_sum: float
    separation_ratio: float
    factor: float
    centre: np.ndarray
    radius: float
    reason: str


def _positions(value, name: str) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    if arr.shape == (3,):
        arr = arr[None, :]
    if arr.ndim != 2 or arr.shape[1] != 3 or arr.shape[0] == 0:
        raise CommonWatchError(f"{name}: expected positions of shape (3,) or (k, 3), got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise CommonWatchError(f"{name}: expected finite positions")
    return arr


def _positive(value, name: str) -> float:
    v = float(value)
    if not (np.isfinite(v) and v > 0):
        raise CommonWatchError(f"{name}: expected a positive number, got {value!r}")
    return v


def common_neck_point(position_a, position_b, masses: Sequence[float]) -> np.ndarray:
    """Where a common horizon of the pair has its waist: the saddle of the two-centre potential
    m_A / |x - x_A| + m_B / |x - x_B| on the segment between the bodies (units of M).

    There m_A / r_A^2 = m_B / r_B^2, so the point divides the segment as sqrt(m_A) : sqrt(m_B),
    nearer the lighter body: (sqrt(m_B) x_A + sqrt(m_A) x_B) / (sqrt(m_A) + sqrt(m_B)). For
    Brill-Lindquist data it is the least conformal factor on the axis (the neck) to leading order.

    Why it and not the centre of mass: a freshly formed common horizon is peanut-shaped with its
    waist at the neck; written as r = h(theta, phi) about the neck its harmonic coefficients decay
    fast, about the centre of mass of an unequal pair they do not (rays from there meet the
    waist obliquely). Measured on the independent axisymmetric solutions 0.4 % below the
    critical separation (tests/numerics/axisymmetric_mots.py): |a_16| / a_0 about the neck
    1.7e-4 (mass ratio 2) and 1.1e-5 (ratio 4), about the centre of mass 1.1e-3 and 2.9e-3,
    about the centroid 1.7e-4 and 2.2e-3 with slower decay beyond (DEVELOPERS.md, "Common
    horizons from the neck").
    """
    xa = _positions(position_a, "position_a")[0]
    xb = _positions(position_b, "position_b")[0]
    m = np.asarray(masses, dtype=float)
    if m.shape != (2,) or not np.all(np.isfinite(m)) or np.any(m <= 0):
        raise CommonWatchError(f"masses: expected two positive numbers, got {np.asarray(masses).tolist()}")
    wa, wb = np.sqrt(m)
    return (wb * xa + wa * xb) / (wa + wb)


def common_surface_guess(
    position_a,
    position_b,
    *,
    radius_a: float,
    radius_b: float,
    masses: Sequence[float],
    enclosure_factor: float = 1.1,
) -> tuple[np.ndarray, float]:
    """Centre and radius of a sphere enclosing both horizons, for a common-surface search.

    The centre is the pair's neck (:func:`common_neck_point`: the bodies weighted by the square
    root of the other's mass); the radius is the larger of |centre - x_i| + r_i (so each
    horizon's enclosing sphere is inside), times ``enclosure_factor`` (> 1 keeps the start
    surface off the individual horizons). For equal masses the centre is the midpoint and the
    radius (d / 2 + r_max) x factor.

    Returns:
        ((3,) centre, radius), units of M.
    """
    xa = _positions(position_a, "position_a")[0]
    xb = _positions(position_b, "position_b")[0]
    ra, rb = _positive(radius_a, "radius_a"), _positive(radius_b, "radius_b")
    enclosure_factor = float(enclosure_factor)
    if not enclosure_factor >= 1.0:
        raise CommonWatchError(f"enclosure_factor: expected a number >= 1, got {enclosure_factor!r}")
    centre = common_neck_point(xa, xb, masses)
    radius = max(np.linalg.norm(centre - xa) + ra, np.linalg.norm(centre - xb) + rb)
    return centre, float(radius * enclosure_factor)


def common_horizon_watch(
    positions_a,
    positions_b,
    *,
    radius_a: float,
    radius_b: float,
    masses: Sequence[float],
    factor: float = DEFAULT_COMMON_FACTOR,
    enclosure_factor: float = 1.1,
    already_searching: bool = False,
) -> CommonSearchAdvice:
    """Decide whether to search for a common surface; give the guess for it.

    Args:
        positions_a, positions_b: (k, 3) or (3,) positions of the bodies at the same times,
            units of M; the first row is the slice to be searched (e.g. the forecast starting
            at the latest slice), later rows the forecast over the interval.
        radius_a, radius_b: each horizon's largest coordinate radius, units of M.
        masses: (m_A, m_B) > 0, e.g. irreducible masses (they place the guess centre).
        factor: search when closest separation < factor x (r_A + r_B) (module docstring).
        enclosure_factor: scale of the guess radius beyond the enclosing sphere.
        already_searching: a search is under way and not yet successful: keep searching.
    """
    pa = _positions(positions_a, "positions_a")
    pb = _positions(positions_b, "positions_b")
    if pa.shape != pb.shape:
        raise CommonWatchError(f"positions_b: shape {pb.shape} does not match positions_a {pa.shape}")
    factor = _positive(factor, "factor")
    ra, rb = _positive(radius_a, "radius_a"), _positive(radius_b, "radius_b")
    separations = np.linalg.norm(pa - pb, axis=1)
    k = int(np.argmin(separations))
    closest = float(separations[k])
    ratio = closest / (ra + rb)
    centre, radius = common_surface_guess(pa[0], pb[0], radius_a=ra, radius_b=rb, masses=masses,
                                          enclosure_factor=enclosure_factor)
    close = ratio < factor
    if close:
        reason = (f"closest forecast separation {closest:.4g} M is {ratio:.3g} x (r_A + r_B) = "
                  f"{ra + rb:.4g} M, below the threshold {factor:g}: search for a common surface")
    elif already_searching:
        reason = (f"separation ratio {ratio:.3g} is above the threshold {factor:g}, but a common-surface "
                  f"search is under way and has not succeeded: keep searching")
    else:
        reason = (f"closest forecast separation {closest:.4g} M is {ratio:.3g} x (r_A + r_B) = "
                  f"{ra + rb:.4g} M, not below the threshold {factor:g}: no common-surface search")
    return CommonSearchAdvice(
        search=bool(close or already_searching),
        closest_separation=closest,
        closest_index=k,
        radius_sum=ra + rb,
        separation_ratio=float(ratio),
        factor=factor,
        centre=centre,
        radius=radius,
        reason=reason,
    )
