"""The archived refinement guidance joined by update: each body's finest region, and a summary
of the guidance over the run (when finest regions merged, when the remnant's region began).

Pure functions of an :class:`~.loading.ArchivedRun`. Guidance is advisory: this is what the
server recommended, not what a run did. Lengths and times in M.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .loading import ArchivedRun

__all__ = ["BodyRegion", "GuidanceUpdate", "GuidanceSummary", "guidance_updates", "summarise_guidance"]


@dataclass(frozen=True, eq=False)
class BodyRegion:
    """The finest region recommended for one body (or the remnant) in one guidance update.

    Attributes:
        label: body label ("common" or the like after merger: the remnant).
        centre: (3,) sphere centre, M; radius: sphere radius, M.
        finest_level: the body's finest level (1 coarsest); spacing: its grid spacing, M.
        lower, upper: (3,) box form, M.
        region_bodies: the bodies the region on that level covers (more than one: merged).
    """

    label: str
    centre: np.ndarray
    radius: float
    finest_level: int
    spacing: float
    lower: np.ndarray
    upper: np.ndarray
    region_bodies: tuple[str, ...]

    @property
    def merged(self) -> bool:
        return len(self.region_bodies) > 1


@dataclass(frozen=True, eq=False)
class GuidanceUpdate:
    """One archived guidance: when, for how long, and each body's finest region (M)."""

    event_seq: int
    time: float
    iteration: int
    valid_from: float
    valid_until: float
    post_merger: bool
    nesting_depth: int
    bodies: tuple[BodyRegion, ...]

    @property
    def merged(self) -> bool:
        """Whether two or more bodies share one finest region (before merger)."""
        return not self.post_merger and any(b.merged for b in self.bodies)


@dataclass(frozen=True, eq=False)
class GuidanceSummary:
    """The refinement guidance over a run (advisory). Times in M.

    Attributes:
        updates: guidance updates archived; first_time, last_time: their span.
        merged_spans: (first, last) update times of each stretch in which two bodies' finest
            regions were one merged region, before merger.
        merged_first_iteration: iteration of the first such update (None if never).
        post_merger_time, post_merger_iteration: first update with a single region around the
            remnant (None if none).
        final: the last update.
    """

    updates: int
    first_time: float
    last_time: float
    merged_spans: tuple[tuple[float, float], ...]
    merged_first_iteration: int | None
    post_merger_time: float | None
    post_merger_iteration: int | None
    final: GuidanceUpdate


def guidance_updates(record: ArchivedRun) -> tuple[GuidanceUpdate, ...]:
    """The archived guidance joined by update: each body's finest region (pure function)."""
    updates = record.guidance.get("updates") or {}
    bodies = record.guidance.get("bodies") or {}
    regions = record.guidance.get("regions") or {}
    if not len(updates.get("event_seq", ())):
        return ()
    region_seq = np.asarray(regions.get("event_seq", np.zeros(0, int)))
    body_seq = np.asarray(bodies.get("event_seq", np.zeros(0, int)))
    # Archives written before the policy's fields were renamed call the column "levels".
    depth = updates["nesting_depth"] if "nesting_depth" in updates else updates["levels"]
    result = []
    for u in np.argsort(np.asarray(updates["time"], dtype=float), kind="stable"):
        seq = int(updates["event_seq"][u])
        entries = []
        for b in np.flatnonzero(body_seq == seq):
            label = str(bodies["label"][b])
            level = int(bodies["finest_level"][b])
            covering = [r for r in np.flatnonzero(region_seq == seq)
                        if int(regions["level"][r]) == level and label in str(regions["bodies"][r]).split("+")]
            if covering:
                r = covering[0]
                centre, radius = np.asarray(regions["centre"][r], float), float(regions["radius"][r])
                lower, upper = np.asarray(regions["lower"][r], float), np.asarray(regions["upper"][r], float)
                covered = tuple(str(regions["bodies"][r]).split("+"))
            else:  # no merged row: the body's own finest sphere and box
                centre, radius = np.asarray(bodies["centre"][b], float), float(bodies["finest_radius"][b])
                lower = np.asarray(bodies["finest_lower"][b], float)
                upper = np.asarray(bodies["finest_upper"][b], float)
                covered = (label,)
            entries.append(BodyRegion(label=label, centre=centre, radius=radius, finest_level=level,
                                      spacing=float(bodies["finest_spacing"][b]), lower=lower, upper=upper,
                                      region_bodies=covered))
        result.append(GuidanceUpdate(
            event_seq=seq, time=float(updates["time"][u]), iteration=int(updates["iteration"][u]),
            valid_from=float(updates["valid_from"][u]), valid_until=float(updates["valid_until"][u]),
            post_merger=bool(updates["post_merger"][u]), nesting_depth=int(depth[u]), bodies=tuple(entries)))
    return tuple(result)


def summarise_guidance(updates: tuple[GuidanceUpdate, ...]) -> GuidanceSummary | None:
    """The guidance over a run in a few numbers; None without any update."""
    if not updates:
        return None
    spans, start, previous = [], None, None
    for u in updates:
        if u.merged and start is None:
            start = u
        if not u.merged and start is not None:
            spans.append((start.time, previous.time))
            start = None
        previous = u
    if start is not None:
        spans.append((start.time, previous.time))
    first_merged = next((u for u in updates if u.merged), None)
    post = next((u for u in updates if u.post_merger), None)
    return GuidanceSummary(
        updates=len(updates), first_time=updates[0].time, last_time=updates[-1].time,
        merged_spans=tuple(spans), merged_first_iteration=None if first_merged is None else first_merged.iteration,
        post_merger_time=None if post is None else post.time,
        post_merger_iteration=None if post is None else post.iteration, final=updates[-1])
