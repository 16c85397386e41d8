"""The data-window rule the server uses: how far around each surface it wants the next slice.

A search crops the slice to a box about the surface it looks for (the *data region*); the
*data windows* the server announces for the next slice hold those boxes plus a small slack, so a
slice cropped to them holds every node the server's own crop takes. Both come from here:

* a seeded surface (found before): its largest coordinate radius r_max times
  :data:`BOX_FACTOR` (a margin for growth and distortion between slices) plus the forecast
  uncertainty (capped at :data:`UNCERTAINTY_CAP_RADII` r_max; ``unknown_motion_factor`` r_max
  when the forecast has no estimate); a window covers the whole forecast path that way;
* a sphere scan (a body never found, or lost): the outer scan radius times
  :data:`SCAN_BOX_FACTOR`;
* a common-surface search from the sphere enclosing both horizons: the sphere's radius times
  :data:`SEARCH_BOX_FACTOR`.

Each is multiplied by :data:`GROWTH_FACTOR` per growth step (a slice lacked data the surface
needed; at most :data:`MAX_GROWTH` steps), and a window adds :data:`WINDOW_SLACK_POINTS` grid
points of the spacing near the surface.

Pure functions; units: G = c = 1, lengths in the run's mass scale M.
"""

from __future__ import annotations

import numpy as np

from .windows import DataWindow

__all__ = [
    "BOX_FACTOR",
    "SCAN_BOX_FACTOR",
    "SEARCH_BOX_FACTOR",
    "WINDOW_SLACK_POINTS",
    "GROWTH_FACTOR",
    "MAX_GROWTH",
    "UNCERTAINTY_CAP_RADII",
    "growth_factor",
    "uncertainty_margin",
    "seeded_reach",
    "search_reach",
    "forecast_path_window",
    "scan_window",
    "search_window",
]

#: Data region about a seeded surface: r_max times this, plus the forecast uncertainty.
BOX_FACTOR = 1.6
#: Data region about a sphere scan: the largest scan radius times this.
SCAN_BOX_FACTOR = 1.25
#: Data region of a common-surface search: the radius of the sphere enclosing both horizons
#: times this. The sphere already clears both horizons by 10 % (tracking.common); Newton from
#: it moves inward to the common surface when one exists.
SEARCH_BOX_FACTOR = 1.25
#: Windows are grown by this many finest grid points beyond the data region (slack for the search).
WINDOW_SLACK_POINTS = 2
#: Half-width factor of a data region and its window per growth step (compounding).
GROWTH_FACTOR = 1.5
#: Most growth steps a surface's region takes.
MAX_GROWTH = 4
#: The uncertainty margin is capped at this many horizon radii (a noisy forecast must not make
#: every crop the whole grid; the scan fallback still covers the rest).
UNCERTAINTY_CAP_RADII = 3.0


def growth_factor(growth: int) -> float:
    """The factor of ``growth`` growth steps: :data:`GROWTH_FACTOR` ** growth."""
    return GROWTH_FACTOR ** growth


def uncertainty_margin(uncertainty: float, radius_max: float, unknown_motion_factor: float) -> float:
    """Margin for the forecast's error about a seeded surface, M.

    ``uncertainty`` (M) capped at :data:`UNCERTAINTY_CAP_RADII` ``radius_max``; when it is not
    finite (no estimate), ``unknown_motion_factor`` ``radius_max``.
    """
    if np.isfinite(uncertainty):
        return min(float(uncertainty), UNCERTAINTY_CAP_RADII * radius_max)
    return unknown_motion_factor * radius_max


def seeded_reach(radius_max: float, uncertainty: float, *, growth: int, unknown_motion_factor: float) -> float:
    """Half-width of the data region about a seeded surface, M (module docstring)."""
    return (growth_factor(growth) * BOX_FACTOR * radius_max
            + uncertainty_margin(uncertainty, radius_max, unknown_motion_factor))


def search_reach(radius: float, *, growth: int) -> float:
    """Half-width of the data region of a common-surface search from a sphere of ``radius``, M."""
    return growth_factor(growth) * SEARCH_BOX_FACTOR * radius


def forecast_path_window(name: str, what: str, path, uncertainties, *, radius_max: float, growth: int,
                         spacing: float, unknown_motion_factor: float) -> DataWindow:
    """The window about a seeded surface's forecast path.

    Args:
        name: the window's name (the surface label).
        what: the surface as the reason names it, e.g. "A (orbit)".
        path: (n, 3) forecast positions over the window's validity, M.
        uncertainties: (n,) their expected errors, M (any non-finite: no estimate).
        radius_max: the surface's largest coordinate radius, M.
        growth: growth steps taken.
        spacing: grid spacing near the surface, M (the slack is :data:`WINDOW_SLACK_POINTS` of it).
        unknown_motion_factor: margin in r_max when the forecast has no estimate.
    """
    path = np.asarray(path, float).reshape(-1, 3)
    unc = np.asarray(uncertainties, float)
    u = float(np.max(unc)) if np.all(np.isfinite(unc)) else float("nan")
    u = min(uncertainty_margin(u, radius_max, unknown_motion_factor), UNCERTAINTY_CAP_RADII * radius_max)
    factor = growth_factor(growth) * BOX_FACTOR
    grow = factor * radius_max + u + WINDOW_SLACK_POINTS * spacing
    return DataWindow(name=name, lower=path.min(axis=0) - grow, upper=path.max(axis=0) + grow,
                      reason=(f"forecast path of {what} grown by {factor:.3g} x r_max {radius_max:.4g} + uncertainty "
                              f"{u:.4g} + {WINDOW_SLACK_POINTS} x {spacing:.4g} M"), growth=growth)


def scan_window(name: str, centre, outer_radius: float, *, reason: str, spacing: float = 0.0,
                growth: int = 0) -> DataWindow:
    """The window about a sphere scan of outer radius ``outer_radius`` (M) about ``centre`` (3,)."""
    half = SCAN_BOX_FACTOR * outer_radius + WINDOW_SLACK_POINTS * spacing
    centre = np.asarray(centre, float)
    return DataWindow(name=name, lower=centre - half, upper=centre + half, reason=reason, growth=growth)


def search_window(name: str, centre, radius: float, *, growth: int, spacing: float) -> DataWindow:
    """The window of a common-surface search from the guess sphere of ``radius`` about ``centre``."""
    grow = search_reach(radius, growth=growth) + WINDOW_SLACK_POINTS * spacing
    centre = np.asarray(centre, float)
    return DataWindow(name=name, lower=centre - grow, upper=centre + grow,
                      reason=(f"common-surface search: the guess sphere about the pair's centre grown by "
                              f"{growth_factor(growth) * SEARCH_BOX_FACTOR:.3g} x radius {radius:.4g} + "
                              f"{WINDOW_SLACK_POINTS} x {spacing:.4g} M"), growth=growth)
