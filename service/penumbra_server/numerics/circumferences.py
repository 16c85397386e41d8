"""Proper circumferences of a horizon in planes set by its spin axis, and the classic spin
estimate from their ratio (Brandt & Seidel, PRD 52, 870 (1995); from memory).

For Kerr the equatorial circumference is 4 pi M for every a and a polar one (a meridian) is
4 sqrt(r_+^2 + a^2) E(k), k = a^2 / (r_+^2 + a^2), with E the complete elliptic integral of the
second kind (parameter convention); the ratio C_p / C_e depends on chi = a / M alone and falls
monotonically from 1 (chi = 0) to sqrt(2) E(1/2) / pi ~ 0.608 (chi = 1), so it can be inverted.
The planes are coordinate planes through a chosen origin (normally the centroid) perpendicular
to, and containing, the given axis (normally the AKV spin direction): on Kerr-Schild slices
they cut the horizon along its equator and meridians.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq
from scipy.special import ellipe

from .measures import plane_cut_spanned, proper_length_closed
from .sources import as_tracked_source
from .surfaces import Surface

__all__ = ["AxisCircumferences", "axis_circumferences", "kerr_circumference_ratio", "spin_from_circumference_ratio"]


@dataclass(frozen=True, eq=False)
class AxisCircumferences:
    """Circumferences about a spin axis (lengths in M).

    Attributes:
        axis: (3,) unit axis used; origin: (3,) the point the planes pass through.
        equatorial: proper length of the cut with the plane through ``origin`` perpendicular to
            ``axis`` (NaN if the cut is not star-shaped about ``origin`` or leaves the data).
        polar: (2,) proper lengths of the cuts with two perpendicular planes containing the axis.
        ratio: mean(polar) / equatorial.
        spin_estimate: chi such that the Kerr ratio equals ``ratio`` (0 for ratio >= 1, NaN
            below the extremal value).
    """

    axis: np.ndarray
    origin: np.ndarray
    equatorial: float
    polar: np.ndarray
    ratio: float
    spin_estimate: float


def kerr_circumference_ratio(chi: float) -> float:
    """C_p / C_e of the Kerr horizon with dimensionless spin 0 <= chi <= 1."""
    if not 0.0 <= chi <= 1.0:
        raise ValueError(f"chi: expected a number in [0, 1], got {chi}")
    r_plus = 1.0 + np.sqrt(1.0 - chi * chi)
    s = r_plus**2 + chi * chi
    return float(4 * np.sqrt(s) * ellipe(chi * chi / s) / (4 * np.pi))


def spin_from_circumference_ratio(ratio: float) -> float:
    """Invert :func:`kerr_circumference_ratio`: chi in [0, 1], 0 if ratio >= 1, NaN if ratio is
    below the extremal value or not finite."""
    if not np.isfinite(ratio):
        return float("nan")
    if ratio >= 1.0:
        return 0.0
    if ratio < kerr_circumference_ratio(1.0):
        return float("nan")
    return float(brentq(lambda c: kerr_circumference_ratio(c) - ratio, 0.0, 1.0, xtol=1e-15, rtol=1e-15))


def _perpendicular_pair(axis: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    helper = np.eye(3)[int(np.argmin(np.abs(axis)))]
    e1 = np.cross(axis, helper)
    e1 /= np.linalg.norm(e1)
    return e1, np.cross(axis, e1)


def axis_circumferences(
    surface: Surface, data, axis, origin, *, samples: int = 128, order: int = 4
) -> AxisCircumferences:
    """Equatorial and polar proper circumferences of ``surface`` about ``axis`` through ``origin``.

    Args:
        axis: (3,) non-zero coordinate vector (normalised here), e.g. ``HorizonSpin.direction``.
        origin: (3,) point the planes pass through, e.g. ``HorizonSpin.centroid``.
        samples: points per cut (spectral differentiation along each cut).
    """
    axis = np.asarray(axis, dtype=float).reshape(-1)
    origin = np.array(origin, dtype=float).reshape(-1)  # a copy: frozen below
    if axis.shape != (3,) or not np.all(np.isfinite(axis)) or np.linalg.norm(axis) == 0:
        raise ValueError(f"axis: expected three finite numbers, not all zero, got {axis.tolist()}")
    if origin.shape != (3,) or not np.all(np.isfinite(origin)):
        raise ValueError(f"origin: expected three finite numbers, got {origin.tolist()}")
    axis = axis / np.linalg.norm(axis)
    source = as_tracked_source(data, order=order)
    e1, e2 = _perpendicular_pair(axis)

    def length(u, v):
        cut = plane_cut_spanned(surface, origin, u, v, samples)
        return float("nan") if cut is None else proper_length_closed(cut, source)

    equatorial = length(e1, e2)
    polar = np.array([length(axis, e1), length(axis, e2)])
    ratio = float(np.mean(polar) / equatorial)
    for arr in (axis, origin, polar):
        arr.setflags(write=False)
    return AxisCircumferences(axis, origin, equatorial, polar, ratio, spin_from_circumference_ratio(ratio))
