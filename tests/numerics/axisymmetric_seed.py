"""Bridge from the axisymmetric reference curves to the project's star-shaped surfaces: the
meridian curve as r(theta) about a point on the axis, projected onto the real harmonics."""

from __future__ import annotations

import numpy as np
from scipy.interpolate import CubicSpline

from penumbra_server.numerics.surfaces import Surface, angular_grid


def harmonic_fit(curve: np.ndarray, centre_z: float, lmax: int) -> Surface:
    """Star-shaped surface about (0, 0, centre_z) through the meridian ``curve`` (2, n) (rho, z
    from the top of the axis to the bottom), rotated about the z axis.

    Raises ValueError if the curve is not star-shaped about that point.
    """
    rho, z = curve
    polar = np.arctan2(rho, z - centre_z)
    keep = np.concatenate([[True], np.diff(polar) > 1e-12])  # drop repeated samples at the joins
    polar, radius = polar[keep], np.hypot(rho, z - centre_z)[keep]
    if np.any(np.diff(polar) <= 0) or abs(polar[0]) > 1e-9 or abs(polar[-1] - np.pi) > 1e-9:
        raise ValueError(f"curve: not star-shaped about z = {centre_z}")
    grid = angular_grid(lmax)
    h = CubicSpline(polar, radius)(grid.theta)
    return Surface(np.array([0.0, 0.0, centre_z]), lmax, grid.project(h))
