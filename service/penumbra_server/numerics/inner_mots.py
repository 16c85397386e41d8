"""MOTSs inside a given surface: the inner common MOTS and the individual ones.

At a merger the common apparent horizon is born together with an inner common MOTS (the two
meet at a fold, where the principal stability eigenvalue of both vanishes); the inner one then
moves inwards and stops being star-shaped. Following it needs the displacement representation
(:mod:`.displaced`); the approach follows Pook-Kolb, Birnholtz, Krishnan & Schnetter, PRD 99,
064005 (2019) (from memory), with our own seeding and solver.

Seeding the inner common MOTS from the outer one: just after formation both lie close together,
so uniform inward displacements of the outer surface by fractions of its mean radius are tried
(:data:`FIRST_SEED`, then deeper or shallower); Newton from too small a one falls back onto the
outer surface; the first one that converges to a distinct surface inside the outer is the inner. From then on each slice
is seeded with the previous solution (:func:`follow_inner`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .displaced import DisplacedSurface, embedding, parametric_area, reference_from_star, star_shaped_form
from .displaced_finder import DisplacedSettings, find_displaced
from .finder import FinderSettings, find_surface
from .sources import as_tracked_source
from .surfaces import Surface, angular_grid

__all__ = ["InsideBody", "InsideResult", "find_mots_inside", "follow_inner", "radial_gap"]

#: Inward displacement (fraction of the outer's mean radius) of the first seed for the inner
#: common MOTS; a seed that falls back onto the outer one is followed by a deeper one (times
#: SEED_GROWTH, or halfway to the shallowest failed one), a seed that fails or converges to
#: something else by a shallower one (halfway to the deepest fallback). Measured on
#: Brill-Lindquist pairs: the inner one is reached from 0.1-0.2 within 0.02 M of the fold and
#: 0.3 at 0.07 M from it.
FIRST_SEED = 0.15
SEED_GROWTH = 1.6
MAX_SEEDS = 6
#: Least degree of the star-shaped form: a freshly formed inner common MOTS has a narrow waist
#: that degree 12 does not resolve in the star-shaped form (measured on Brill-Lindquist pairs).
STAR_LMAX = 16
#: Largest rms misfit (in mean radii) of a star-shaped fit still reported as the MOTS's
#: star-shaped form (our choice: the distinctness margin).
STAR_MISFIT = 2e-3
#: A converged surface counts as distinct from the outer one when some point lies farther than
#: this fraction of the mean radius inside it (our choice; above the finder's truncation error).
DISTINCT_FRACTION = 2e-3


@dataclass(frozen=True)
class InsideBody:
    """A body to look for an individual MOTS around: label, centre (3,) and a radius guess (M)."""

    label: str
    centre: tuple[float, float, float]
    radius: float


@dataclass(frozen=True)
class InsideResult:
    """One MOTS looked for inside a surface.

    Attributes:
        label: "<outer label>_inner" for the inner common MOTS, the body's label otherwise.
        kind: "inner_common" or "individual".
        success: found (a MOTS inside the given surface, distinct from it).
        status: finder status (:data:`.find_results.STATUS_MESSAGES`).
        message: what happened.
        displaced: the MOTS in the displacement representation (None if not found).
        star: the MOTS as a star-shaped :class:`Surface` (a least-squares fit of degree
            max(STAR_LMAX, lmax)) when it is star-shaped about its centroid or the outer's centre
            and the fit is close (``message`` says why not otherwise); quantities of the MOTS
            itself (``area``) come from the displacement form.
        area: proper area (M^2), NaN if not found.
        residual_max: max |Theta| (1/M) at the nodes of the last iterate.
        attempts: Newton solves run.
        wall_time_s: seconds spent.
    """

    label: str
    kind: str
    success: bool
    status: int
    message: str
    displaced: DisplacedSurface | None
    star: Surface | None
    area: float
    residual_max: float
    attempts: int
    wall_time_s: float


def radial_gap(outer: Surface, points: np.ndarray) -> np.ndarray:
    """(N,) outer radius minus distance from the outer's centre, for points (N, 3), in M:
    positive inside the (star-shaped) outer surface."""
    rel = np.asarray(points, dtype=float) - outer.centre
    dist = np.linalg.norm(rel, axis=1)
    theta = np.arccos(np.clip(rel[:, 2] / dist, -1.0, 1.0))
    phi = np.mod(np.arctan2(rel[:, 1], rel[:, 0]), 2 * np.pi)
    return outer.radius(theta, phi) - dist


def _inside_and_distinct(outer: Surface, surface: DisplacedSurface) -> tuple[bool, str]:
    points = embedding(surface).x  # the solver's nodes (their bases are cached)
    gap = radial_gap(outer, points) / outer.mean_radius
    if gap.min() < -DISTINCT_FRACTION:
        return False, f"crosses the outer surface (by {-gap.min():.2e} of its mean radius)"
    if gap.max() < DISTINCT_FRACTION:
        return False, "fell back onto the outer surface"
    return True, ""


def _timer():
    import time

    return time.perf_counter()


def _star_form(surface: DisplacedSurface, lmax: int, outer: Surface | None) -> tuple[Surface | None, str]:
    """(the MOTS as a star-shaped surface of degree ``lmax`` or None, and why not): the
    least-squares fit about the better of the outer's centre and the centroid, kept when it
    misses the surface by at most :data:`STAR_MISFIT` mean radii (rms)."""
    candidates = () if outer is None else (outer.centre,)
    fit = star_shaped_form(surface, lmax, candidates=candidates, max_misfit=STAR_MISFIT)
    if fit is None:
        if star_shaped_form(surface, lmax, candidates=candidates) is None:
            return None, "not star-shaped about its centroid or the outer surface's centre"
        return None, f"its star-shaped fit of degree {lmax} misses it by more than {STAR_MISFIT:g} mean radii"
    return fit, ""


def _inner_result(label, found, source, star_lmax, attempts, start, success, message, outer, settings) -> InsideResult:
    surface = found.surface if found is not None else None
    star, area = None, float("nan")
    if surface is not None and success:
        star, why = _star_form(surface, star_lmax, outer)
        if why:
            message = f"{message}; no star-shaped form: {why}"
        area = parametric_area(surface, source)
    residual = found.residual_max if found is not None else float("nan")
    return InsideResult(label, "inner_common", success, found.status if found else -1, message, surface if success else None,
                        star, area, residual, attempts, _timer() - start)


def find_inner_common(data, outer: Surface, *, label: str = "common", settings: DisplacedSettings = DisplacedSettings(),
                      lmax: int | None = None, star_lmax: int | None = None) -> InsideResult:
    """The inner common MOTS inside the (star-shaped) ``outer`` common MOTS, from inward seeds;
    labelled "<label>_inner". ``lmax``: degree of the displacement (default the outer's);
    ``star_lmax``: degree of the star-shaped form (default max(STAR_LMAX, lmax))."""
    start = _timer()
    lmax = outer.lmax if lmax is None else lmax
    star_lmax = max(STAR_LMAX, lmax) if star_lmax is None else star_lmax
    source = as_tracked_source(data, order=settings.interpolation_order)
    reference = reference_from_star(outer)
    notes = []
    found = None
    fraction, below, above = FIRST_SEED, 0.0, None
    for attempt in range(1, MAX_SEEDS + 1):
        found = find_displaced(source, DisplacedSurface.at_reference(reference, lmax, -fraction * outer.mean_radius),
                               settings=settings)
        ok, why = _inside_and_distinct(outer, found.surface) if found.success else (False, found.message.split(" (")[0])
        if ok:
            return _inner_result(f"{label}_inner", found, source, star_lmax, attempt, start, True,
                                 f"found from the seed {fraction:.3g} mean radii inside the outer surface; {found.message}",
                                 outer, settings)
        notes.append(f"seed {fraction:.3g}: {why}")
        # Fell back onto the outer surface: seed deeper. Failed or went elsewhere: seed shallower.
        if found.success and why.startswith("fell back"):
            below = fraction
            fraction = 0.5 * (fraction + above) if above is not None else min(SEED_GROWTH * fraction, 0.9)
        else:
            above = fraction
            fraction = 0.5 * (below + fraction)
    return _inner_result(f"{label}_inner", found, source, star_lmax, MAX_SEEDS, start, False,
                         "no inner common MOTS found: " + "; ".join(notes), outer, settings)


def follow_inner(data, previous: DisplacedSurface, *, label: str, outer: Surface | None = None,
                 settings: DisplacedSettings = DisplacedSettings(), star_lmax: int | None = None) -> InsideResult:
    """The inner common MOTS on a new slice from the previous slice's solution (the reference is
    refreshed inside the solve as the shape changes). With ``outer`` given, a solution that is
    not inside it, or has fallen onto it, is not accepted."""
    start = _timer()
    source = as_tracked_source(data, order=settings.interpolation_order)
    found = find_displaced(source, previous, settings=settings)
    star_lmax = max(STAR_LMAX, previous.lmax) if star_lmax is None else star_lmax
    if not found.success:
        return _inner_result(label, found, source, star_lmax, 1, start, False, found.message, outer, settings)
    if outer is not None:
        ok, why = _inside_and_distinct(outer, found.surface)
        if not ok:
            return _inner_result(label, found, source, star_lmax, 1, start, False, f"not accepted: {why}", outer, settings)
    return _inner_result(label, found, source, star_lmax, 1, start, True, found.message, outer, settings)


def find_mots_inside(data, outer: Surface, *, label: str = "common", bodies: tuple[InsideBody, ...] = (),
                     settings: DisplacedSettings = DisplacedSettings(), finder_settings: FinderSettings | None = None,
                     inner: bool = True) -> tuple[InsideResult, ...]:
    """MOTSs inside the star-shaped surface ``outer`` (e.g. the common apparent horizon).

    Args:
        data: as for :func:`.finder.find_surface`.
        outer: the enclosing surface (M).
        label: the outer surface's label; the inner common MOTS is labelled "<label>_inner".
        bodies: where to look for individual MOTSs (one sphere guess each, found with the
            star-shaped finder and accepted only inside ``outer``).
        settings: options of the displacement solve (inner common MOTS).
        finder_settings: options of the individual finds (default: degree of ``outer``).
        inner: look for the inner common MOTS.

    Returns:
        one :class:`InsideResult` per MOTS looked for: the inner common one first, then the
        bodies in order.
    """
    out = []
    if inner:
        out.append(find_inner_common(data, outer, label=label, settings=settings))
    finder_settings = finder_settings or FinderSettings(lmax=outer.lmax)
    for body in bodies:
        start = _timer()
        found = find_surface(data, Surface.sphere(body.centre, body.radius, finder_settings.lmax), settings=finder_settings)
        success, message = found.success, found.message
        if success:
            pts = found.surface.points(found.surface.on_grid(angular_grid(found.surface.lmax)))
            if radial_gap(outer, pts).min() <= 0:
                success, message = False, f"not inside the outer surface: {message}"
        area = float("nan")
        displaced = None
        if success:
            displaced = DisplacedSurface.at_reference(reference_from_star(found.surface), found.surface.lmax)
            area = parametric_area(displaced, as_tracked_source(data, order=finder_settings.interpolation_order))
        out.append(InsideResult(body.label, "individual", success, found.status, message, displaced,
                                found.surface if success else None, area, found.residual_max, 1, _timer() - start))
    return tuple(out)
