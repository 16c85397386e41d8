"""Starting surfaces for the finder: from nothing (a scan of coordinate spheres) or from a
previous surface."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .excision import ExcisedDataError
from .expansion import expansion_at
from .interpolation import DEFAULT_ORDER
from .slices import SliceError
from .sources import as_tracked_source
from .surfaces import Surface, angular_grid

__all__ = ["NO_TRAPPED_SURFACE_YET", "SphereScan", "scan_spheres", "sphere_scan_profile", "guess_from_previous"]


@dataclass(frozen=True)
class SphereScan:
    """Mean expansion of coordinate spheres about one centre.

    Attributes:
        radii: (n,) sphere radii sampled, units of M.
        mean_expansion: (n,) solid-angle mean of Theta on each sphere, 1/M (NaN where the
            sphere left the data or needs data inside an excised region).
        min_expansion: (n,) smallest nodal Theta on each sphere, 1/M.
        candidates: outermost first: where the mean expansion changes sign, and the outer
            barrier (the radius beyond which every sphere is untrapped, min Theta > 0), each
            refined by bisection. Spheres about a non-spherical horizon (a binary, a spinning
            hole in Kerr-Schild coordinates) can have a positive mean everywhere; the barrier
            still gives a starting sphere that encloses the horizon.
        message: what the scan saw, for reports: the candidates, or why there are none:
            :data:`NO_TRAPPED_SURFACE_YET` (every sphere was evaluated and none brackets a
            horizon) as distinct from spheres that left the data or needed excised data.
    """

    radii: np.ndarray
    mean_expansion: np.ndarray
    min_expansion: np.ndarray
    candidates: tuple[float, ...]
    message: str = ""

    @property
    def no_trapped_surface_yet(self) -> bool:
        """No candidate although every sampled sphere could be evaluated."""
        return not self.candidates and bool(np.all(np.isfinite(self.mean_expansion)))


#: Start of :attr:`SphereScan.message` when the data was there but nothing is trapped yet.
NO_TRAPPED_SURFACE_YET = "no trapped surface here yet"


def _scan_message(centre, radii, mean, candidates) -> str:
    where = f"coordinate spheres about ({centre[0]:.4g}, {centre[1]:.4g}, {centre[2]:.4g})"
    if candidates:
        return f"{len(candidates)} candidate radius(es) from {where}: " + ", ".join(f"{r:.6g}" for r in candidates) + " M"
    ok = np.isfinite(mean)
    if ok.all():
        return (f"{NO_TRAPPED_SURFACE_YET}: no sign change of the expansion of {where} with radii "
                f"{radii[0]:.4g}..{radii[-1]:.4g} M (all of them evaluated)")
    if not ok.any():
        return (f"no candidate: every one of the {where} with radii {radii[0]:.4g}..{radii[-1]:.4g} M leaves the "
                f"data or needs excised data")
    return (f"no candidate: no sign change of the expansion of {where} where the data covers them "
            f"(radii {radii[ok].min():.4g}..{radii[ok].max():.4g} M of {radii[0]:.4g}..{radii[-1]:.4g} M); the "
            f"others leave the data or need excised data")


def _sphere_expansion(source, grid, centre, radius) -> tuple[float, float]:
    """(mean, min) of Theta over a coordinate sphere; NaN where the sphere leaves the data or
    needs excised data."""
    sphere = Surface.sphere(centre, radius, grid.lmax)
    rd = sphere.on_grid(grid)
    try:
        geo = source(sphere.points(rd))
    except (ExcisedDataError, SliceError):
        return float("nan"), float("nan")
    if not geo.covered.all():
        return float("nan"), float("nan")
    with np.errstate(invalid="ignore", divide="ignore"):
        theta = expansion_at(rd, geo).theta
    if not np.all(np.isfinite(theta)):
        return float("nan"), float("nan")
    return float(np.sum(grid.weights * theta) / (4 * np.pi)), float(theta.min())


def _bisect(f, lo: float, hi: float, f_lo: float) -> float:
    # 24 halvings of a bracket a few per cent wide: ~1e-9 relative, far below what Newton needs.
    for _ in range(24):
        mid = 0.5 * (lo + hi)
        f_mid = f(mid)
        if not np.isfinite(f_mid):
            break
        if np.sign(f_mid) == np.sign(f_lo):
            lo, f_lo = mid, f_mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def sphere_scan_profile(
    data, centre, r_min: float, r_max: float, *, samples: int = 48, lmax: int = 4, order: int = DEFAULT_ORDER
) -> SphereScan:
    """Scan spheres of radius r_min..r_max (geometric spacing) about ``centre``.

    Only sign changes between two covered samples count; each bracket is refined by 24
    bisections (a seed for Newton, not a result).
    """
    if not 0 < r_min < r_max:
        raise ValueError(f"radius range: expected 0 < r_min < r_max, got {r_min}, {r_max}")
    if samples < 2:
        raise ValueError(f"samples: expected at least 2, got {samples}")
    centre = np.asarray(centre, dtype=float).reshape(3)
    source = as_tracked_source(data, order=order)
    grid = angular_grid(lmax)
    radii = np.geomspace(r_min, r_max, samples)
    profile = np.array([_sphere_expansion(source, grid, centre, r) for r in radii])
    mean, minimum = profile[:, 0], profile[:, 1]
    found = []
    for i in range(samples - 1):
        a, b = mean[i], mean[i + 1]
        if np.isfinite(a) and np.isfinite(b) and a != 0.0 and np.sign(a) != np.sign(b):
            found.append(_bisect(lambda r: _sphere_expansion(source, grid, centre, r)[0], radii[i], radii[i + 1], a))
    outside = np.nonzero(np.isfinite(minimum) & (minimum <= 0))[0]
    if outside.size and outside[-1] + 1 < samples and minimum[outside[-1] + 1] > 0:
        i = outside[-1]
        found.append(_bisect(lambda r: _sphere_expansion(source, grid, centre, r)[1], radii[i], radii[i + 1], minimum[i]))
    candidates: list[float] = []
    for r in sorted(found, reverse=True):
        if not candidates or candidates[-1] - r > 1e-6 * candidates[-1]:  # same radius twice
            candidates.append(r)
    return SphereScan(radii, mean, minimum, tuple(candidates), _scan_message(centre, radii, mean, candidates))


def scan_spheres(data, centre, r_min: float, r_max: float, *, samples: int = 48, lmax: int = 4, order: int = DEFAULT_ORDER) -> tuple[float, ...]:
    """Candidate radii (outermost first) where the mean expansion of coordinate spheres about
    ``centre`` changes sign: seeds for Newton where nothing is known yet."""
    return sphere_scan_profile(data, centre, r_min, r_max, samples=samples, lmax=lmax, order=order).candidates


def guess_from_previous(previous: Surface, new_centre=None, *, lmax: int | None = None) -> Surface:
    """A previous surface's shape moved rigidly to ``new_centre`` (e.g. a forecast position),
    optionally re-expanded to ``lmax``."""
    surface = previous if new_centre is None else previous.translated(new_centre)
    return surface if lmax is None else surface.with_lmax(lmax)
