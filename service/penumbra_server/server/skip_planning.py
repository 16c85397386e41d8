"""The planner's part of tracking through skipped slices: when a body's search gets a
relocation fallback, with what radius, and the data region that needs.

A body found before whose last find is a skip away (:func:`penumbra_server.tracking.skipping.is_skip`,
:func:`~penumbra_server.tracking.skipping.moves_far`), or that was missed since, gets: a seed uncertainty grown with the elapsed time
(:func:`~penumbra_server.tracking.skipping.grown_uncertainty`), a
:class:`~penumbra_server.server.relocation.Relocation` within
:func:`~penumbra_server.tracking.skipping.relocation_radius` of the forecast (widened per
miss), the data region enlarged to hold it, and the body's mass rank among the other bodies
(the worker judges every find after a skip by it: server/relocation.py). Dense slices found every time get none of this:
their plans keep the usual region and uncertainty, with the relocation (inside that region)
as the worker's last fallback.

Units: G = c = 1, lengths and times in M.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ..tracking.data_windows import BOX_FACTOR, SCAN_BOX_FACTOR, growth_factor, uncertainty_margin
from ..tracking.skipping import grown_uncertainty, is_skip, moves_far, relocation_radius, usual_spacing
from .relocation import Relocation
from .scheduler import SCAN_RADIUS_FACTORS
from .surface_state import SurfaceState

__all__ = ["SkipRelocation", "skipped_relocation", "RELOCATION_CAP_MASSES"]

#: The relocation radius is at most this many times the body's mass (M): beyond, the body is
#: not where any forecast puts it and the ordinary lost-body scan carries on.
RELOCATION_CAP_MASSES = 6.0
#: Outer sphere-scan radius about a peak, in units of the body's largest coordinate radius.
_PEAK_SCAN_RADII = 2.0


@dataclass(frozen=True, eq=False)
class SkipRelocation:
    """What the planner adds: the worker's fallback, the grown seed uncertainty (M) and the data
    region [lower, upper] (3,) the fallback needs."""

    relocation: Relocation
    uncertainty: float
    lower: np.ndarray
    upper: np.ndarray


def skipped_relocation(h: SurfaceState, body, t: float, position, forecast_uncertainty: float,
                       others: Sequence[SurfaceState] = ()) -> SkipRelocation | None:
    """The relocation for body ``body`` (its spec entry) searched at time ``t`` (M) about its
    forecast ``position`` (3,) (None before its first find). Without a skip or a miss the
    fallback keeps to the usual search region and the seed's uncertainty is the forecast's."""
    if not h.ever_found or h.retired_at is not None:
        return None
    elapsed = float(t) - float(h.found_time)
    spacing = usual_spacing(h.track.times)
    skipped = is_skip(elapsed, spacing) or h.misses > 0 or moves_far(h.speed(), elapsed, h.radius_max)
    uncertainty = grown_uncertainty(forecast_uncertainty, speed=h.speed(), samples=h.track.count, elapsed=elapsed)
    mass = max(float(body.mass), 1e-12)
    radius = relocation_radius(h.radius_max, uncertainty, misses=h.misses, cap=RELOCATION_CAP_MASSES * mass)
    scan_outer = _PEAK_SCAN_RADII * h.radius_max
    centre = np.asarray(position, float)
    searched = [o for o in others if o.ever_found and o.retired_at is None]
    rank = sum(1 for o in searched if o.irreducible_mass > h.irreducible_mass)
    # Without a skip or a miss the fallback searches only the usual region (plans unchanged).
    half = radius + SCAN_BOX_FACTOR * scan_outer if skipped else 0.0
    if not skipped:
        uncertainty = float(forecast_uncertainty)
        radius = min(radius, BOX_FACTOR * h.radius_max * growth_factor(h.growth)
                     + uncertainty_margin(uncertainty, h.radius_max, 1.0))
    return SkipRelocation(
        relocation=Relocation(centre=centre, radius=radius, min_separation=h.radius_max,
                              scan_radii=(SCAN_RADIUS_FACTORS[0] * mass, scan_outer), skipped=skipped,
                              mass_rank=rank, body_count=1 + len(searched)),
        # A forecast without an estimate (one sample) stays "unknown" for the seed; the
        # relocation radius above carries the light-speed bound instead.
        uncertainty=uncertainty if np.isfinite(forecast_uncertainty) else float(forecast_uncertainty),
        lower=centre - half, upper=centre + half,
    )
