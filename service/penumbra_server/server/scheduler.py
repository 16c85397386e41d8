"""Which surfaces to look for in a slice, from where, and in which sub-box of the data.

The planner protocol (:class:`SurfacePlanner`, :class:`SurfacePlan`) and the simple
:class:`ExpectedBodiesPlanner`: every expected body, seeded from that body's previous result
(re-centred on its centroid moved on at its last velocity) or, with no prior, by scanning coordinate spheres about the
spec's position with radii 0.1 m .. 2 m (m the body's approximate mass; puncture data has its
apparent horizon near r = m/2 in isotropic coordinates, docs/references.md item 1), then Newton from
the outermost candidate. The server's default is
:class:`penumbra_server.server.planning.SteeringPlanner` (forecast seeds, lost bodies held,
the common horizon of a pair); this one stays for custom planners that wrap it.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Mapping, Protocol, Sequence

import numpy as np

from ..numerics.slices import Slice
from ..numerics.surfaces import Surface
from ..tracking.data_windows import BOX_FACTOR, SCAN_BOX_FACTOR
from ._spec import RunSettings
from .surface_state import SurfaceState

__all__ = ["SurfaceTrack", "SurfacePlan", "SurfacePlanner", "ExpectedBodiesPlanner", "SCAN_RADIUS_FACTORS", "recentred"]

#: Scan radii with no prior, as multiples of the body's approximate mass (see module docstring).
SCAN_RADIUS_FACTORS = (0.1, 2.0)
# After this many misses in a row the seed is dropped and the wide scan runs again.
_MISSES_BEFORE_WIDE_SCAN = 2


#: The planners' view of one surface: what the run knows about it (server/surface_state.py).
SurfaceTrack = SurfaceState


def recentred(surface: Surface, centre) -> Surface:
    """``surface``'s shape about a new centre, its l = 1 part dropped.

    To first order the l = 1 coefficients are the offset of the surface from its expansion
    centre; moving the centre onto the centroid takes that offset up, so keeping them would
    count it twice.
    """
    coefficients = np.array(surface.coefficients)
    coefficients[1:4] = 0.0  # indices l*l + l + m for l = 1
    return Surface(np.asarray(centre, dtype=float), surface.lmax, coefficients)


@dataclass(frozen=True, eq=False)
class SurfacePlan:
    """One surface to look for: label, optional seed, scan fallback and the data region.

    Attributes:
        label, seed, scan_centre, scan_radii, box_lower, box_upper: as :class:`SurfaceJob`
            takes them (the box is the data region cropped for the worker), units of M.
        extra_seeds: further starting surfaces tried in order when the seed fails.
        search: False reports the surface as not searched in this slice (``note`` says why)
            without running a job (e.g. an individual horizon lost inside the common one).
        note: why the surface is not searched (``search`` False), or free text.
        seed_position, seed_uncertainty, seed_model: the forecast the seed was placed at (units
            of M; inf uncertainty when unknown; model "", "static", "polynomial" or "orbit"),
            archived with the surface row.
        lmax: harmonic degree of this surface (None: the run's lmax); its archive group keeps
            the degree it was created with.
        fallback_to_flow: run the fast flow when Newton fails (slow; off for searches repeated
            every slice for a surface that may not exist yet).
        retry_wider: when the search runs out of data, try once more on twice the region (off
            for those searches too: their iterates run away when the surface does not exist).
        must_enclose: points (3,) a found surface must hold inside (a common horizon must
            enclose both bodies); a surface that does not is reported not found.
        inside_of, outer: see the attributes.
        may_not_exist: the surface may not exist yet (a common horizon before it formed): a
            search whose starting surfaces the data covers but that finds nothing reports "no
            trapped surface here yet" (SurfaceJob.may_not_exist).
        relocate: as :class:`~penumbra_server.server.jobs.SurfaceJob` takes it
            (looking again for a body after skipped slices; server/relocation.py).
    """

    label: str
    seed: Surface | None
    scan_centre: np.ndarray | None
    scan_radii: tuple[float, float] | None
    box_lower: np.ndarray
    box_upper: np.ndarray
    extra_seeds: tuple[Surface, ...] = ()
    search: bool = True
    note: str = ""
    seed_position: np.ndarray | None = None
    seed_uncertainty: float = float("nan")
    seed_model: str = ""
    lmax: int | None = None
    fallback_to_flow: bool = True
    retry_wider: bool = True
    must_enclose: tuple[np.ndarray, ...] = ()
    #: Label of the surface this one is searched inside (the inner common MOTS inside the common
    #: horizon); the run resolves it into ``outer`` after that surface's search in the same slice.
    inside_of: str | None = None
    outer: Surface | None = None
    #: The surface's previous solution in the displacement representation, if it has one.
    displaced_seed: object | None = None
    may_not_exist: bool = False
    relocate: object | None = None
    #: Another search of the same slice waits for this one's outcome (it is searched inside this
    #: surface): its job goes to the workers before the slice's others (dispatch.py).
    leads: bool = False

    def points_outside(self, surface: Surface) -> list[np.ndarray]:
        """The ``must_enclose`` points that lie on or outside ``surface``."""
        outside = []
        for point in self.must_enclose:
            rel = np.asarray(point, dtype=float) - surface.centre
            r = float(np.linalg.norm(rel))
            if r == 0.0:
                continue
            theta, phi = np.arccos(np.clip(rel[2] / r, -1.0, 1.0)), np.arctan2(rel[1], rel[0])
            if r >= surface.radius([theta], [phi])[0]:
                outside.append(np.asarray(point, dtype=float))
        return outside

    def widened(self, factor: float) -> "SurfacePlan":
        """The same plan with the data region scaled about its middle."""
        mid = 0.5 * (self.box_lower + self.box_upper)
        half = 0.5 * (self.box_upper - self.box_lower) * factor
        return replace(self, box_lower=mid - half, box_upper=mid + half)


class SurfacePlanner(Protocol):
    """Decides the surfaces to look for in a slice."""

    def plan(self, settings: RunSettings, tracks: Mapping[str, SurfaceTrack], slice_: Slice) -> Sequence[SurfacePlan]:
        ...


class ExpectedBodiesPlanner:
    """One surface per expected body (see the module docstring)."""

    def plan(self, settings: RunSettings, tracks: Mapping[str, SurfaceTrack], slice_: Slice) -> list[SurfacePlan]:
        plans = []
        lo_factor, hi_factor = SCAN_RADIUS_FACTORS
        for body in settings.bodies:
            track = tracks.get(body.label)
            wide = (lo_factor * body.mass, hi_factor * body.mass)
            if track is not None and track.surface is not None and track.consecutive_misses < _MISSES_BEFORE_WIDE_SCAN:
                # Seed: the last shape, re-centred on where its centroid should be now.
                centre = track.predicted_centroid(slice_.time)
                seed = recentred(track.surface, centre)
                scan_centre = centre
                motion = float(np.linalg.norm(centre - track.centroid))
                # Tight region: the surface, a margin for its growth, and its motion.
                reach = BOX_FACTOR * track.radius_max + motion
                # The fallback scan stays inside that region.
                scan_radii = (wide[0], max(reach / SCAN_BOX_FACTOR, 2.0 * wide[0]))
                middle = centre
            else:
                seed = None
                scan_centre = np.asarray(body.position, dtype=float)
                if track is not None and track.centroid is not None:
                    # Lost: look where it should have moved on to since it was last seen.
                    scan_centre = track.predicted_centroid(slice_.time)
                scan_radii = wide
                middle = scan_centre
                reach = SCAN_BOX_FACTOR * scan_radii[1]
            plans.append(
                SurfacePlan(
                    label=body.label,
                    seed=seed,
                    scan_centre=np.asarray(scan_centre, dtype=float),
                    scan_radii=scan_radii,
                    box_lower=middle - reach,
                    box_upper=middle + reach,
                )
            )
        return plans
