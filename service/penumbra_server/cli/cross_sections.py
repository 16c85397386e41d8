"""Horizon cross-sections from archived harmonic coefficients (for plots; pure functions).

A surface is stored as a centre and the real spherical-harmonic coefficients of its radius
h(theta, phi) (see :mod:`penumbra_server.numerics.surfaces`). Its cross-section with a plane
through the centre is the closed curve c + h(d(alpha)) d(alpha), d(alpha) = cos(alpha) e1 +
sin(alpha) e2, where e1, e2 span the plane; the radius is evaluated with the numerics' own
harmonic basis, so plots and finder agree on the convention.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from penumbra_server.numerics.surfaces import Surface

__all__ = ["PLANES", "CrossSection", "cross_section"]

#: In-plane unit vectors (e1, e2) of the three coordinate planes, and the axis indices plotted.
PLANES: dict[str, tuple[tuple[float, float, float], tuple[float, float, float], tuple[int, int]]] = {
    "xy": ((1.0, 0.0, 0.0), (0.0, 1.0, 0.0), (0, 1)),
    "xz": ((1.0, 0.0, 0.0), (0.0, 0.0, 1.0), (0, 2)),
    "yz": ((0.0, 1.0, 0.0), (0.0, 0.0, 1.0), (1, 2)),
}


@dataclass(frozen=True, eq=False)
class CrossSection:
    """A closed planar curve of a surface.

    Attributes:
        plane: "xy", "xz" or "yz".
        points: (samples, 3) coordinate positions on the curve, units of M (first point not repeated).
        radius: (samples,) coordinate radius h along the curve, units of M.
        alpha: (samples,) in-plane angle from e1 towards e2, radians.
    """

    plane: str
    points: np.ndarray
    radius: np.ndarray
    alpha: np.ndarray

    def in_plane(self) -> tuple[np.ndarray, np.ndarray]:
        """The two plotted coordinates (e.g. x and y for "xy")."""
        a, b = PLANES[self.plane][2]
        return self.points[:, a], self.points[:, b]


def cross_section(centre, lmax: int, coefficients, *, plane: str = "xy", samples: int = 256) -> CrossSection:
    """Cross-section through ``centre`` of the surface with these coefficients.

    Args:
        centre: (3,) expansion centre, units of M.
        lmax: highest harmonic degree of ``coefficients``.
        coefficients: ((lmax + 1)^2,) real harmonic coefficients of the radius, index l*l + l + m.
        plane: coordinate plane through the centre: "xy", "xz" or "yz".
        samples: points along the curve (>= 8).
    """
    if plane not in PLANES:
        raise ValueError(f"plane: expected one of {', '.join(PLANES)}, got {plane!r}")
    if samples < 8:
        raise ValueError(f"samples: expected at least 8 points along the curve, got {samples}")
    coefficients = np.asarray(coefficients, dtype=float)
    if not np.all(np.isfinite(coefficients)):
        raise ValueError("coefficients: expected finite numbers (a surface that was not found has none)")
    surface = Surface(np.asarray(centre, dtype=float), int(lmax), coefficients)
    e1, e2, _ = PLANES[plane]
    alpha = np.linspace(0.0, 2.0 * np.pi, samples, endpoint=False)
    directions = np.cos(alpha)[:, None] * np.asarray(e1) + np.sin(alpha)[:, None] * np.asarray(e2)
    theta = np.arccos(np.clip(directions[:, 2], -1.0, 1.0))
    phi = np.mod(np.arctan2(directions[:, 1], directions[:, 0]), 2.0 * np.pi)
    radius = surface.radius(theta, phi)
    points = surface.centre + radius[:, None] * directions
    return CrossSection(plane=plane, points=points, radius=radius, alpha=alpha)
