"""Finding a body again after skipped slices: candidate centres from the metric, and a mass check.

When slices are skipped (overload, or a client that sends only every few slices) a body moves
far between the slices the server sees; its forecast from a short or sparse track may be off by
more than the horizon's size, and then neither the seed placed at the forecast nor a sphere
scan about it finds the horizon (a scan about a point outside a horizon sees no sign change of
the expansion). The fallback here, run by the worker after both failed: the local maxima of the
metric's volume factor (:func:`penumbra_server.numerics.body_peaks.conformal_peaks`) within a
radius of the forecast that grows with the time since the body was last found, nearest to the
forecast first; about each, the previous surface re-centred and a sphere scan.

Another body's horizon may sit inside that radius, and a common horizon too. After a skip every
find is judged (:class:`SkipJudge`): a surface that encloses none or several of the peaks is not
a body's horizon; of the distinct horizons found, the body takes the one of its mass rank (the
heavier body stays the heavier: irreducible masses of a pair change together as it approaches,
so an absolute mass tolerance would reject the right horizon) when as many were found as there
are bodies and their masses differ, else the one nearest its forecast. A find about the peak
nearest the forecast is taken at once when every other peak is more than twice as far (no other
body could be meant).

Units: G = c = 1, lengths in M.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..numerics.body_peaks import conformal_peaks
from ..numerics.surfaces import Surface

__all__ = ["Relocation", "SkipJudge", "relocation_guesses", "RELOCATION_PEAKS", "RELOCATION_SCANS"]

#: Peaks tried (nearest to the forecast first), and those of them also scanned with spheres.
RELOCATION_PEAKS = 3
RELOCATION_SCANS = 2


@dataclass(frozen=True, eq=False)
class Relocation:
    """Where to look for a lost body: forecast ``centre`` (3,), search ``radius``, peaks closer
    than ``min_separation`` merged, sphere-scan radii (r_min, r_max) about each peak; M.

    ``skipped``: slices were skipped (or the body missed): every find is judged
    (:class:`SkipJudge`). ``mass_rank``: the body's rank by latest irreducible mass among the
    ``body_count`` bodies searched (0 the heaviest).
    """

    centre: np.ndarray
    radius: float
    min_separation: float
    scan_radii: tuple[float, float]
    skipped: bool = False
    mass_rank: int = 0
    body_count: int = 1


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


def _encloses(surface: Surface, point) -> bool:
    rel = np.asarray(point, float) - surface.centre
    r = float(np.linalg.norm(rel))
    if r == 0.0:
        return True
    theta, phi = np.arccos(np.clip(rel[2] / r, -1.0, 1.0)), np.arctan2(rel[1], rel[0])
    return r < float(surface.radius([theta], [phi])[0])


class SkipJudge:
    """Judges the finds of one search after skipped slices (module docstring).

    :meth:`consider` each successful find; :attr:`complete` once as many distinct horizons were
    found as there are bodies; :meth:`pick` the body's. ``rejected``: why finds were refused.
    """

    def __init__(self, relocation: Relocation, data) -> None:
        self.relocation = relocation
        reach = relocation.radius + 4.0 * relocation.min_separation
        self.peaks = [np.asarray(p.position, float) for p in
                      conformal_peaks(data, relocation.centre, reach, min_separation=relocation.min_separation,
                                      max_peaks=8)]
        self.by_peak: dict[int, tuple] = {}
        self.rejected: list[str] = []
        self.settled: tuple | None = None  # a find that can only be this body's
        distances = sorted((float(np.linalg.norm(p - np.asarray(relocation.centre, float))), i)
                           for i, p in enumerate(self.peaks))
        # The peak nearest the forecast is unambiguous when every other is more than twice as far.
        self.nearest = (distances[0][1] if distances and (len(distances) == 1 or 2 * distances[0][0] < distances[1][0])
                        else None)

    def consider(self, kind: str, result, quantities: dict, message: str) -> None:
        inside = [i for i, p in enumerate(self.peaks) if _encloses(result.surface, p)]
        # A lone body cannot be confused with another (and excised data may show several peaks
        # about the excised region inside one horizon): only runs of several bodies are judged.
        if self.peaks and len(inside) != 1 and self.relocation.body_count > 1:
            self.rejected.append(f"{kind}: the surface encloses {len(inside)} of the metric's peaks, "
                                 f"not one (not a single body's horizon)")
            return
        key = inside[0] if len(inside) == 1 else -1 - len(self.by_peak)
        self.by_peak.setdefault(key, (kind, result, quantities, message))
        if self.nearest is not None and inside == [self.nearest]:
            self.settled = (kind, result, quantities, message)

    @property
    def candidates(self) -> list[tuple]:
        return list(self.by_peak.values())

    @property
    def complete(self) -> bool:
        return self.settled is not None or len(self.by_peak) >= max(1, self.relocation.body_count)

    def pick(self) -> tuple:
        """(kind, result, quantities, message) of the find the body takes."""
        if self.settled is not None:
            kind, result, quantities, message = self.settled
            return kind, result, quantities, f"{message}; after skipped slices: the peak nearest the forecast"
        found = self.candidates
        masses = [float(c[2].get("irreducible_mass", np.nan)) for c in found]
        count = self.relocation.body_count
        if (count > 1 and len(found) == count and np.all(np.isfinite(masses))
                and max(masses) > 1.05 * min(masses)):
            order = np.argsort(masses)[::-1]
            chosen = found[int(order[min(self.relocation.mass_rank, count - 1)])]
            how = f"mass rank {self.relocation.mass_rank + 1} of {count} horizons found"
        else:
            centre = np.asarray(self.relocation.centre, float)
            chosen = min(found, key=lambda c: float(np.linalg.norm(
                np.asarray(c[2].get("centroid", c[1].surface.centre), float) - centre)))
            how = f"nearest the forecast of {len(found)} horizon(s) found"
        kind, result, quantities, message = chosen
        return kind, result, quantities, f"{message}; after skipped slices: {how}"
