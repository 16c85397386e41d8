"""Where rays from a point cross a star-shaped surface: one bracketing root finder on every ray
at once, for plane cuts (measures) and for re-expanding a surface about a new centre
(resolution)."""

from __future__ import annotations

import numpy as np

from .surfaces import Surface, angular_grid

__all__ = ["ray_crossings"]


def ray_crossings(surface: Surface, origin, directions: np.ndarray, *, iterations: int = 80) -> np.ndarray | None:
    """Distances rho (n,) along the unit ``directions`` (n, 3) from ``origin`` (3,) at which the
    rays meet ``surface``, units of M; None when ``origin`` is not inside the surface or a ray
    does not leave it within twice the surface's largest radius (then the surface is not
    star-shaped about ``origin`` as far as these rays tell).

    Each ray is bracketed (F = r - h < 0 inside, > 0 outside), then solved by the Illinois
    variant of regula falsi: bracketing keeps it safe, superlinear convergence keeps it cheap.
    """
    origin = np.asarray(origin, dtype=float).reshape(3)
    directions = np.asarray(directions, dtype=float).reshape(-1, 3)
    c = surface.centre

    def level(rho):
        x = origin + rho[:, None] * directions - c
        r = np.linalg.norm(x, axis=1)
        th = np.arccos(np.clip(x[:, 2] / np.maximum(r, 1e-300), -1.0, 1.0))
        ph = np.arctan2(x[:, 1], x[:, 0])
        return r - surface.radius(th, ph)

    n = directions.shape[0]
    lo = np.zeros(n)
    f_lo = level(lo + 1e-12)
    if np.any(f_lo >= 0):
        return None
    h_max = float(np.max(surface.on_grid(angular_grid(surface.lmax)).h))
    hi = np.full(n, 2.0 * h_max + np.linalg.norm(origin - c))
    f_hi = level(hi)
    if np.any(f_hi <= 0):
        return None
    side = np.zeros(n)
    mid = lo
    for _ in range(iterations):
        mid = (lo * f_hi - hi * f_lo) / (f_hi - f_lo)
        f_mid = level(mid)
        inside = f_mid < 0
        lo, f_lo = np.where(inside, mid, lo), np.where(inside, f_mid, f_lo)
        hi, f_hi = np.where(inside, hi, mid), np.where(inside, f_hi, f_mid)
        # Illinois: halve the stale end's value when the same end moved twice in a row.
        f_hi = np.where(inside & (side > 0), 0.5 * f_hi, f_hi)
        f_lo = np.where(~inside & (side < 0), 0.5 * f_lo, f_lo)
        side = np.where(inside, 1.0, -1.0)
        if np.max(np.abs(f_mid)) < 1e-14 * max(1.0, float(np.max(hi))):
            break
    return mid
