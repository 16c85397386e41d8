"""Finding a body again after skipped slices: candidate centres from the metric, and a mass check.

When slices are skipped (overload, or a client that sends only every few slices) a body moves
far between the slices the server sees; its forecast from a short or sparse track may be off by
more than the horizon's size, and then neither the seed placed at the forecast nor a sphere
scan about it finds the horizon (a scan about a point outside a horizon sees no sign change of
the expansion). The fallback here, run by the worker after both failed: the local maxima of the
metric's volume factor (:func:`penumbra_server.numerics.body_peaks.conformal_peaks`) within a
radius of the forecast that grows with the time since the body was last found, nearest to the
forecast first; about each, the previous surface re-centred and a sphere scan.

Another body's horizon may sit inside that radius: a surface whose irreducible mass is more
than a tolerance off the body's latest one is not accepted (:func:`mass_mismatch`); for equal
masses the nearest candidate to the forecast wins.

Units: G = c = 1, lengths in M.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..numerics.body_peaks import conformal_peaks
from ..numerics.surfaces import Surface

__all__ = ["Relocation", "relocation_guesses", "mass_mismatch", "RELOCATION_PEAKS", "RELOCATION_SCANS"]

#: Peaks tried (nearest to the forecast first), and those of them also scanned with spheres.
RELOCATION_PEAKS = 3
RELOCATION_SCANS = 2


@dataclass(frozen=True, eq=False)
class Relocation:
    """Where to look for a lost body: forecast ``centre`` (3,), search ``radius``, peaks closer
    than ``min_separation`` merged, sphere-scan radii (r_min, r_max) about each peak; M."""

    centre: np.ndarray
    radius: float
    min_separation: float
    scan_radii: tuple[float, float]


def relocation_guesses(relocation: Relocation, data, seed: Surface | None, lmax: int, *,
                       order: int) -> list[tuple[str, Surface]]:
    """Starting surfaces about the volume-factor peaks near the forecast, nearest first."""
    from ..numerics.guesses import scan_spheres
    from .scheduler import recentred

    peaks = conformal_peaks(data, relocation.centre, relocation.radius, min_separation=relocation.min_separation,
                            max_peaks=2 * RELOCATION_PEAKS)
    centre = np.asarray(relocation.centre, float)
    nearest = sorted(peaks, key=lambda p: float(np.linalg.norm(np.subtract(p.position, centre))))
    guesses: list[tuple[str, Surface]] = []
    for rank, peak in enumerate(nearest[:RELOCATION_PEAKS]):
        where = np.asarray(peak.position, float)
        if seed is not None:
            guesses.append(("relocated", recentred(seed, where).with_lmax(lmax)))
        if rank < RELOCATION_SCANS:
            r_min, r_max = relocation.scan_radii
            radii = scan_spheres(data, where, r_min, r_max, order=order)
            guesses.extend(("relocated scan", Surface.sphere(where, r, lmax)) for r in radii[:2])
    return guesses


def mass_mismatch(measured: float, expected: float, tolerance: float) -> str:
    """Why a surface of irreducible mass ``measured`` is not the body expected at ``expected``
    (relative ``tolerance``); "" when it fits or either mass is unknown."""
    if not (np.isfinite(measured) and np.isfinite(expected) and expected > 0):
        return ""
    off = abs(measured - expected) / expected
    if off <= tolerance:
        return ""
    return (f"irreducible mass {measured:.4g} M is {100 * off:.0f} % off the body's latest {expected:.4g} M "
            f"(tolerance {100 * tolerance:.0f} %): another body's horizon")
