"""Independent reference: MOTSs of time-symmetric Brill-Lindquist pairs on the z axis, by
shooting in the meridian plane (tests only; uses nothing of penumbra_server).

With K_ij = 0 a MOTS is a minimal surface of gamma = psi^4 delta. An axisymmetric surface is a
curve (rho, z) in the meridian plane with area 2 pi closed-integral rho psi^4 dl_flat, so its
generating curve is a geodesic of the 2-metric (rho psi^4)^2 (d rho^2 + d z^2) = e^{2w} delta.
With flat arclength sigma and tangent angle a, (rho', z') = (cos a, sin a), a geodesic of a
conformally flat metric has flat curvature equal to the normal derivative of w:

    a' = -sin a (1 / rho + 4 psi_rho / psi) + cos a (4 psi_z / psi),    w = ln(rho psi^4).

A surface leaves the axis perpendicularly; near the axis a = 2 (psi_z / psi) sigma + O(sigma^2)
(the 1/rho term doubles the curvature there), which starts the integration off the singular
point. A branch is shot from the axis above (heading down) and one from the axis below (heading
up, integrated in the mirrored frame); they must meet at a matching level z_m with the same
rho and the same direction.

Units: lengths in the bare masses' units (m1, m2 as given); the pair sits at z = +d/2 (m1) and
z = -d/2 (m2).
"""

from __future__ import annotations

from dataclasses import dataclass

import math

import numpy as np
from scipy.integrate import solve_ivp
from scipy.optimize import brentq, minimize_scalar, newton, root

START_ARCLENGTH = 1e-5
RTOL, ATOL = 1e-11, 1e-13


@dataclass(frozen=True)
class Pair:
    """Bare masses m1 at z = +d/2 and m2 at z = -d/2."""

    m1: float
    m2: float
    d: float

    @property
    def masses(self) -> np.ndarray:
        return np.array([self.m1, self.m2])

    @property
    def heights(self) -> np.ndarray:
        return np.array([self.d / 2, -self.d / 2])

    def psi(self, rho, z):
        r = np.sqrt(np.asarray(rho)[..., None] ** 2 + (np.asarray(z)[..., None] - self.heights) ** 2)
        return 1 + np.sum(self.masses / (2 * r), axis=-1)

    def neck(self) -> float:
        """z between the punctures where psi on the axis is least (the matching level)."""
        z1, z2 = self.d / 2, -self.d / 2
        return float(minimize_scalar(lambda z: self.psi(0.0, z), bounds=(z2 + 1e-9, z1 - 1e-9), method="bounded",
                                     options={"xatol": 1e-13}).x)


def _rhs(_, y, m1, h1, m2, h2):
    # plain floats: this runs thousands of times per shot
    rho, z, a, _area = y.tolist()
    d1, d2 = z - h1, z - h2
    r1 = math.sqrt(rho * rho + d1 * d1)
    r2 = math.sqrt(rho * rho + d2 * d2)
    c1, c2 = m1 / (2 * r1 * r1 * r1), m2 / (2 * r2 * r2 * r2)
    psi = 1 + m1 / (2 * r1) + m2 / (2 * r2)
    psi_rho = -(c1 + c2) * rho
    psi_z = -(c1 * d1 + c2 * d2)
    sa, ca = math.sin(a), math.cos(a)
    curvature = -sa * (1 / rho + 4 * psi_rho / psi) + ca * 4 * psi_z / psi
    return [ca, sa, curvature, 2 * math.pi * rho * psi**4]


@dataclass(frozen=True)
class BranchEnd:
    """Where a branch crosses the matching level: rho, the tangent angle a (in the frame it was
    integrated in), the area it swept (2 pi integral rho psi^4 dl) and the curve (2, n) sampled."""

    rho: float
    angle: float
    area: float
    curve: np.ndarray


def shoot(pair: Pair, z_start: float, z_match: float, *, downward: bool = True, samples: int = 400) -> BranchEnd | None:
    """Integrate from the axis at ``z_start`` until the level ``z_match``; None if the curve returns
    to the axis or runs away first. ``downward=False`` shoots upward (mirrored frame: the
    returned angle is the mirrored one, the curve is in the original frame)."""
    sign = 1.0 if downward else -1.0
    heights = sign * pair.heights
    z0, zm = sign * z_start, sign * z_match
    dz = z0 - heights
    psi = 1 + np.sum(pair.masses / (2 * np.abs(dz)))
    psi_z = -np.sum(pair.masses * dz / (2 * np.abs(dz) ** 3))
    a1 = 2 * psi_z / psi
    s0 = START_ARCLENGTH
    y0 = [s0, z0 + 0.5 * a1 * s0 * s0, a1 * s0, 2 * np.pi * psi**4 * s0 * s0 / 2]

    def level(_, y, *args):
        return y[1] - zm

    level.terminal, level.direction = True, -1

    def axis(_, y, *args):
        return y[0] - 0.5 * s0

    axis.terminal, axis.direction = True, -1
    sol = solve_ivp(_rhs, (s0, 200.0), y0, args=(pair.m1, heights[0], pair.m2, heights[1]), method="DOP853",
                    rtol=RTOL, atol=ATOL,
                    events=[level, axis], dense_output=True)
    if sol.t_events[0].size == 0:
        return None
    rho, _z, a, area = sol.y_events[0][0]
    s = np.linspace(s0, sol.t_events[0][0], samples)
    pts = sol.sol(s)[:2]
    pts = np.concatenate([[[0.0], [z0]], pts], axis=1)
    return BranchEnd(float(rho), float(a), float(area), np.array([pts[0], sign * pts[1]]))


def _wrap(angle):
    return (angle + np.pi) % (2 * np.pi) - np.pi


@dataclass(frozen=True)
class AxisymmetricMots:
    """A MOTS found by shooting: start heights, area (bare-mass units squared), matching level,
    and the meridian curve (2, n) from the top of the axis to the bottom."""

    z_top: float
    z_bottom: float
    z_match: float
    area: float
    curve: np.ndarray

    @property
    def irreducible_mass(self) -> float:
        return float(np.sqrt(self.area / (16 * np.pi)))


def _bottom_for(pair, top: BranchEnd, z_match, bottom_range, guess):
    """z_b in ``bottom_range`` whose upward branch crosses z_match at the top branch's rho
    (secant from ``guess``; the crossing rho grows monotonically as z_b moves off the neck)."""

    def gap(zb):
        if not bottom_range[0] < zb < bottom_range[1]:
            return np.nan
        end = shoot(pair, zb, z_match, downward=False, samples=2)
        return np.nan if end is None else end.rho - top.rho

    try:
        zb = newton(gap, guess, x1=guess + 1e-3 * (bottom_range[1] - bottom_range[0]), tol=1e-13, maxiter=30)
    except (RuntimeError, ValueError, OverflowError):
        return np.nan
    return float(zb) if np.isfinite(zb) and abs(gap(zb)) < 1e-9 else np.nan


def _mirror_guess(pair: Pair, z_top: float) -> float:
    """Bottom start height mirroring the top one, scaled by the mass ratio."""
    return -pair.d / 2 - (z_top - pair.d / 2) * pair.m2 / pair.m1


def angle_mismatch(pair: Pair, z_top: float, z_match: float, bottom_range, guess=None) -> tuple[float, float]:
    """(direction mismatch at z_match, z_bottom) for the top branch from ``z_top`` joined to the
    bottom branch with the same rho at z_match; for an up-down symmetric pair the bottom branch
    is the mirror image and the mismatch is a + pi/2 (the curve crosses the mid-plane
    vertically). NaN when no bottom branch meets the top one."""
    top = shoot(pair, z_top, z_match, samples=2)
    if top is None:
        return np.nan, np.nan
    if pair.m1 == pair.m2 and z_match == 0.0:
        return float(top.angle + np.pi / 2), -z_top
    zb = _bottom_for(pair, top, z_match, bottom_range, _mirror_guess(pair, z_top) if guess is None else guess)
    if not np.isfinite(zb):
        return np.nan, np.nan
    bottom = shoot(pair, zb, z_match, downward=False, samples=2)
    return float(_wrap(top.angle + bottom.angle - np.pi)), zb


def _match_level(pair: Pair) -> float:
    return 0.0 if pair.m1 == pair.m2 else pair.neck()


def _common_bottom_range(pair: Pair):
    return (-pair.d / 2 - 4.0 * (pair.m1 + pair.m2), -pair.d / 2 - 1e-4)


def assemble(pair: Pair, z_top: float, z_bottom: float, z_match: float, samples: int = 400) -> AxisymmetricMots:
    top = shoot(pair, z_top, z_match, samples=samples)
    bottom = shoot(pair, z_bottom, z_match, downward=False, samples=samples)
    curve = np.concatenate([top.curve, bottom.curve[:, ::-1]], axis=1)
    return AxisymmetricMots(z_top, z_bottom, z_match, top.area + bottom.area, curve)


def _scan_top(pair, z_match, bottom_range, top_range, count, mirror=None):
    zs = np.linspace(*top_range, count)
    out = [angle_mismatch(pair, z, z_match, bottom_range, None if mirror is None else mirror(z))[0] for z in zs]
    return zs, np.array(out)


def _roots(pair, zm, rng, zs, f, mirror=None):
    def mismatch(z):
        return angle_mismatch(pair, z, zm, rng, None if mirror is None else mirror(z))[0]

    roots = []
    for i in range(len(zs) - 1):
        # a sign change of a continuous mismatch (not a jump across the wrap or a gap)
        if np.isfinite(f[i]) and np.isfinite(f[i + 1]) and f[i] * f[i + 1] < 0 and abs(f[i] - f[i + 1]) < 1.0:
            roots.append(brentq(mismatch, zs[i], zs[i + 1], xtol=1e-13, rtol=1e-13))
    return roots


def _deepest(pair, zm, rng, top_range, count):
    """Start height where the mismatch is least (coarse scan, then Brent): (scan heights, scan
    mismatches, z*, least mismatch)."""
    zs, f = _scan_top(pair, zm, rng, top_range, count)
    ok = np.isfinite(f) & (np.abs(f) < 1.0)
    if not ok.any():
        return zs, f, np.nan, np.inf
    i = int(np.argmin(np.where(ok, f, np.inf)))
    lo, hi = zs[max(i - 1, 0)], zs[min(i + 1, len(zs) - 1)]

    def finite_mismatch(z):  # where no branch pair meets, count it as no dip
        value = angle_mismatch(pair, z, zm, rng)[0]
        return value if np.isfinite(value) else 1.0

    res = minimize_scalar(finite_mismatch, bounds=(lo, hi), method="bounded", options={"xatol": 1e-10})
    return zs, f, float(res.x), float(res.fun)


def _default_top_range(pair: Pair):
    return (pair.d / 2 + 0.02 * min(pair.m1, pair.m2), pair.d / 2 + 0.8 * (pair.m1 + pair.m2))


def common_mots(pair: Pair, *, top_range=None, count: int = 60) -> dict[str, AxisymmetricMots]:
    """The common MOTSs enclosing both punctures: {"outer": ..., "inner": ...} (empty beyond the
    critical separation). Both are roots of the mismatch as a function of the top start height,
    one either side of its minimum; the outer one starts higher."""
    zm = _match_level(pair)
    rng = _common_bottom_range(pair)
    zs, f, z_star, f_star = _deepest(pair, zm, rng, top_range or _default_top_range(pair), count)
    if not f_star < 0:
        return {}

    def mismatch(z):
        return angle_mismatch(pair, z, zm, rng)[0]

    out = {}
    above = [z for z, v in zip(zs, f) if z > z_star and np.isfinite(v) and v > 0]
    if above:
        zt = brentq(mismatch, z_star, min(above), xtol=1e-13, rtol=1e-13)
        out["outer"] = assemble(pair, zt, angle_mismatch(pair, zt, zm, rng)[1], zm)
    # below z*, the mismatch turns positive again before the branch stops reaching the neck;
    # the coarse scan may step over that, so look finely between z* and the scan point below
    below = zs[zs < z_star]
    if below.size:
        fine = np.linspace(z_star, below[-2] if below.size > 1 else below[-1], 24)[1:]
        for z in fine:
            v = mismatch(z)
            if np.isfinite(v) and 0 < v < 1.0:
                zt = brentq(mismatch, z, z_star, xtol=1e-13, rtol=1e-13)
                out["inner"] = assemble(pair, zt, angle_mismatch(pair, zt, zm, rng)[1], zm)
                break
    return out


def fold_gap(pair: Pair, *, top_range=None, count: int = 60) -> tuple[float, float]:
    """(least angle mismatch over the top start heights, where): negative while the outer and
    inner common MOTSs exist, zero at the fold (their meeting), positive beyond."""
    zm, rng = _match_level(pair), _common_bottom_range(pair)
    return _deepest(pair, zm, rng, top_range or _default_top_range(pair), count)[2:][::-1]


def critical_separation(m1: float, m2: float, d_low: float, *, step: float | None = None) -> float:
    """Largest coordinate separation d at which a common MOTS exists (bare-mass units).

    ``d_low`` must have common MOTSs. Steps of ``step`` (default 0.02 (m1 + m2)) bracket the
    fold, then Brent's method finds where the fold gap vanishes. After one full scan at
    ``d_low`` each gap is searched in a window about the previous minimum (the fold moves
    continuously with d; its start height roughly with the upper puncture, d / 2).
    """
    total = m1 + m2
    step = step or 0.02 * total
    gap_low, z_star = fold_gap(Pair(m1, m2, d_low))
    if not gap_low < 0:
        raise ValueError(f"d_low: no common MOTS at d = {d_low} (fold gap {gap_low:.3g})")
    window = 0.05 * total

    def windowed(d, centre):
        return fold_gap(Pair(m1, m2, d), top_range=(centre - window, centre + window), count=11)

    d, centre = d_low, z_star
    while True:
        g, where = windowed(d + step, centre + step / 2)
        if g > 0:
            break
        d, centre = d + step, where
    return float(brentq(lambda x: windowed(x, centre + (x - d) / 2)[0], d, d + step, xtol=1e-9, rtol=1e-12))


def individual_mots(pair: Pair, which: int) -> AxisymmetricMots:
    """The MOTS about puncture ``which`` (0: m1 above, 1: m2 below), matched at its height by
    Powell's hybrid method on (rho, direction) mismatch in the two start heights, from the
    isotropic-Schwarzschild guess z_p +- m / 2 (good while the companion is not too close)."""
    z_p, m = pair.heights[which], pair.masses[which]

    def residual(starts):
        top = shoot(pair, starts[0], z_p, samples=2)
        bottom = shoot(pair, starts[1], z_p, downward=False, samples=2)
        if top is None or bottom is None:
            return [1.0, 1.0]
        return [top.rho - bottom.rho, _wrap(top.angle + bottom.angle - np.pi)]

    sol = root(residual, [z_p + m / 2, z_p - m / 2], method="hybr", options={"xtol": 1e-13})
    if not sol.success or np.max(np.abs(sol.fun)) > 1e-10:
        raise ValueError(f"no individual MOTS found about puncture {which} of {pair}: {sol.message}")
    return assemble(pair, float(sol.x[0]), float(sol.x[1]), z_p)
