"""Surfaces of constant expansion (Theta = c) and the smallest c among those enclosing a region.

Before a common apparent horizon forms, the surfaces that enclose both bodies and have constant
expansion Theta = c exist only for c above some smallest value c_min > 0; as formation
approaches c_min falls to zero, and the c = 0 member of the family is the new common horizon
(Schnetter, CQG 20, 4719 (2003); from memory). Tracking c_min over the slices tells how close
the common horizon is.

How c_min is found here: the family of constant-expansion surfaces is followed with the surface's
solid-angle mean radius rbar (the l = 0 coefficient) held fixed and c an unknown. In that
parameter the family has no turning point where the c-parametrised family folds: c(rbar) is
smooth and has a minimum there, which is c_min. (Large spheres have c ~ 2/r -> 0 too: marching
in, c first rises to a largest value and then falls; c_min is the minimum inside that maximum,
where the family of enclosing surfaces turns back.) So the search marches inward from a large sphere,
one Newton solve per rbar (each started from the previous surface), until c turns up, and then
minimises c(rbar) on the bracket (scipy's bounded scalar minimiser). Pure functions; the
augmented Newton system reuses the finder's pointwise linearisation of Theta.

Units: lengths M, expansions 1/M.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, replace

import numpy as np
from scipy.optimize import minimize_scalar

from .finder import _evaluate, _jacobian, _Run  # the finder's linearisation of Theta, shared
from .interpolation import DEFAULT_ORDER
from .sources import as_tracked_source
from .surfaces import Surface, angular_grid

__all__ = [
    "ConstantExpansionSettings",
    "ConstantExpansionSurface",
    "SmallestExpansion",
    "solve_constant_expansion",
    "solve_at_mean_radius",
    "smallest_enclosing_expansion",
]

_MAX_SHORTENINGS = 10


@dataclass(frozen=True)
class ConstantExpansionSettings:
    """Options of the constant-expansion solves and the c_min search.

    Attributes:
        lmax: harmonic degree of the surfaces.
        tolerance: target max |Theta - c| at the nodes, 1/M.
        max_iterations: Newton iterations per solve.
        radius_step_fraction: inward march step as a fraction of the current mean radius.
        min_radius: the march stops (status "no fold") below this mean radius, M.
        radius_tolerance: bracket width (M) at which the minimisation of c(rbar) stops.
        truncation_check: also solve at l_max - 2 at the minimiser; the difference of c enters
            the uncertainty (one more solve).
        interpolation_order: interpolation nodes per axis for grid data.
    """

    lmax: int = 8
    tolerance: float = 1e-9
    max_iterations: int = 30
    radius_step_fraction: float = 0.08
    min_radius: float = 1e-3
    radius_tolerance: float = 1e-4
    truncation_check: bool = True
    interpolation_order: int = DEFAULT_ORDER

    def __post_init__(self) -> None:
        if self.lmax < 2:
            raise ValueError(f"lmax: expected an integer >= 2, got {self.lmax}")
        if not self.tolerance > 0:
            raise ValueError(f"tolerance: expected a positive number, got {self.tolerance}")
        if not 0 < self.radius_step_fraction < 0.5:
            raise ValueError(f"radius_step_fraction: expected a number in (0, 0.5), got {self.radius_step_fraction}")
        if not self.min_radius > 0 or not self.radius_tolerance > 0:
            raise ValueError("min_radius and radius_tolerance: expected positive numbers")


@dataclass(frozen=True)
class ConstantExpansionSurface:
    """One solve.

    Attributes:
        converged: max |Theta - c| at the nodes reached the tolerance (or the projected residual did).
        surface: the last iterate (None if nothing could be evaluated).
        expansion: c, 1/M.
        residual_max: max |Theta - c| at the nodes, 1/M.
        iterations: Newton iterations.
        message: what happened.
    """

    converged: bool
    surface: Surface | None
    expansion: float
    residual_max: float
    iterations: int
    message: str


@dataclass(frozen=True)
class SmallestExpansion:
    """The smallest constant expansion of surfaces enclosing the centre's region.

    Attributes:
        found: a minimum of c(rbar) was bracketed and refined.
        c_min: the smallest expansion, 1/M (NaN when not found).
        c_min_error: its uncertainty, 1/M: solve residual + truncation (l_max vs l_max - 2) +
            what the finite bracket leaves.
        surface: the surface with Theta = c_min (None when not found).
        mean_radius: its solid-angle mean coordinate radius, M.
        radii, expansions: (n,) the marched samples (rbar in M, c in 1/M), outermost first.
        solves: Newton solves spent.
        wall_time_s: seconds spent.
        message: what happened.
    """

    found: bool
    c_min: float
    c_min_error: float
    surface: Surface | None
    mean_radius: float
    radii: tuple[float, ...]
    expansions: tuple[float, ...]
    solves: int
    wall_time_s: float
    message: str


def _newton(source, guess: Surface, c0: float, settings: ConstantExpansionSettings, free_c: bool) -> ConstantExpansionSurface:
    """Newton on P(Theta - c) = 0 (P: projection onto the harmonics). With ``free_c`` the l = 0
    coefficient is held and c is solved for (its column replaces that of a_00); otherwise c = c0."""
    run = _Run(source, angular_grid(guess.lmax))
    ones = run.grid.project(np.ones(run.grid.size))
    surface, c = guess, float(c0)
    ev = _evaluate(run, surface)
    if ev is None:
        return ConstantExpansionSurface(False, None, c, float("nan"), 0, f"guess not evaluable (status {run.last_failure})")

    def residual(e, cc):
        r = e.theta - cc
        return r, float(np.linalg.norm(run.grid.project(r))), float(np.max(np.abs(r)))

    r, proj, rmax = residual(ev, c)
    for it in range(settings.max_iterations + 1):
        if rmax <= settings.tolerance or proj <= 0.1 * settings.tolerance:
            return ConstantExpansionSurface(True, ev.surface, c, rmax, it, "converged")
        if it == settings.max_iterations:
            break
        J = _jacobian(run, ev)
        if free_c:
            J = J.copy()
            J[:, 0] = -ones
        rhs = -run.grid.project(r)
        if not (np.all(np.isfinite(J)) and np.all(np.isfinite(rhs))):
            return ConstantExpansionSurface(False, ev.surface, c, rmax, it, "linearisation not finite")
        step = np.linalg.lstsq(J, rhs, rcond=None)[0]
        lam, accepted = 1.0, None
        for _ in range(_MAX_SHORTENINGS):
            coeffs = ev.surface.coefficients.copy()
            dc = 0.0
            if free_c:
                dc = lam * step[0]
                coeffs[1:] += lam * step[1:]
            else:
                coeffs += lam * step
            trial = Surface(ev.surface.centre, ev.surface.lmax, coeffs)
            h = trial.on_grid(run.grid).h
            cand = _evaluate(run, trial) if np.all(h > 0) else None
            if cand is not None:
                cr, cproj, cmax = residual(cand, c + dc)
                if cproj < (1.0 - 1e-4 * lam) * proj:
                    accepted = (cand, c + dc, cr, cproj, cmax)
                    break
            lam *= 0.5
        if accepted is None:
            return ConstantExpansionSurface(False, ev.surface, c, rmax, it, "no damped step reduced the residual")
        ev, c, r, proj, rmax = accepted
    return ConstantExpansionSurface(False, ev.surface, c, rmax, settings.max_iterations, "iteration cap reached")


def solve_constant_expansion(data, guess: Surface, expansion: float, *,
                             settings: ConstantExpansionSettings = ConstantExpansionSettings()) -> ConstantExpansionSurface:
    """A surface with Theta = ``expansion`` (1/M) near ``guess`` (re-expanded to ``settings.lmax``).

    ``data``: anything :func:`~.finder.find_surface` accepts (a Slice, a reference spacetime...).
    """
    if not np.isfinite(expansion):
        raise ValueError(f"expansion: expected a finite number, got {expansion}")
    return _newton(as_tracked_source(data, order=settings.interpolation_order), guess.with_lmax(settings.lmax), expansion, settings, free_c=False)


def solve_at_mean_radius(data, guess: Surface, *, expansion_guess: float = 0.0,
                         settings: ConstantExpansionSettings = ConstantExpansionSettings()) -> ConstantExpansionSurface:
    """The constant-expansion surface whose mean radius is that of ``guess``; c is solved for."""
    return _newton(as_tracked_source(data, order=settings.interpolation_order), guess.with_lmax(settings.lmax), expansion_guess, settings, free_c=True)


def _at_radius(surface: Surface, radius: float) -> Surface:
    coeffs = surface.coefficients.copy()
    coeffs[0] = radius * np.sqrt(4.0 * np.pi)
    return Surface(surface.centre, surface.lmax, coeffs)


def smallest_enclosing_expansion(data, centre, start_radius: float, *,
                                 settings: ConstantExpansionSettings = ConstantExpansionSettings()) -> SmallestExpansion:
    """c_min of the constant-expansion surfaces about ``centre`` (3,), marching in from the
    coordinate sphere of radius ``start_radius`` (M; it should enclose everything the surfaces
    are to enclose). Not finding the minimum (the march left the data, a solve failed, or the
    mean radius fell below ``settings.min_radius``) is reported in the result, not raised."""
    if not start_radius > 0:
        raise ValueError(f"start_radius: expected a positive number, got {start_radius}")
    centre = np.asarray(centre, dtype=float).reshape(3)
    started = time.perf_counter()
    source = as_tracked_source(data, order=settings.interpolation_order)
    solves = 0
    radii: list[float] = []
    cs: list[float] = []
    surfaces: list[Surface] = []

    def solve(radius: float, near: Surface, c_guess: float, lmax: int = settings.lmax):
        nonlocal solves
        solves += 1
        st = settings if lmax == settings.lmax else _replace_lmax(settings, lmax)
        return _newton(source, _at_radius(near.with_lmax(lmax), radius), c_guess, st, free_c=True)

    def finish(found, c, err, surface, rbar, message):
        return SmallestExpansion(found, c, err, surface, rbar, tuple(radii), tuple(cs), solves,
                                 time.perf_counter() - started, message)

    first = solve(start_radius, Surface.sphere(centre, start_radius, settings.lmax), 2.0 / start_radius)
    if not first.converged:
        return finish(False, float("nan"), float("nan"), None, float("nan"),
                      f"no constant-expansion surface at the start radius {start_radius:.4g} M: {first.message}")
    radii.append(start_radius), cs.append(first.expansion), surfaces.append(first.surface)
    step = settings.radius_step_fraction * start_radius
    while True:
        if len(cs) >= 3 and cs[-1] > cs[-2] < cs[-3]:
            break  # c fell and turned up: the minimum lies between radii[-3] and radii[-1]
        radius = radii[-1] - step
        if radius < settings.min_radius:
            return finish(False, float("nan"), float("nan"), None, float("nan"),
                          f"c kept falling down to mean radius {radii[-1]:.4g} M (c = {cs[-1]:.4g} / M): no minimum found")
        # Extrapolate the guess linearly along the family from the last two members.
        near = surfaces[-1]
        c_guess = cs[-1]
        if len(surfaces) >= 2:
            t = step / (radii[-2] - radii[-1])
            near = Surface(centre, settings.lmax, surfaces[-1].coefficients
                           + t * (surfaces[-1].coefficients - surfaces[-2].coefficients))
            c_guess = cs[-1] + t * (cs[-1] - cs[-2])
        result = solve(radius, near, c_guess)
        if not result.converged:
            if step < 1e-3 * start_radius:
                return finish(False, float("nan"), float("nan"), None, float("nan"),
                              f"the family ends at mean radius {radii[-1]:.4g} M before c turns up "
                              f"(c = {cs[-1]:.4g} / M): {result.message}")
            step *= 0.5
            continue
        radii.append(radius), cs.append(result.expansion), surfaces.append(result.surface)
        step = min(settings.radius_step_fraction * radius, 1.5 * step)

    lo, hi = radii[-1], radii[-3]
    best = {"c": cs[-2], "r": radii[-2], "surface": surfaces[-2]}
    failed = []

    def objective(radius: float) -> float:
        result = solve(radius, best["surface"], best["c"])
        if not result.converged:
            failed.append(radius)
            return float("inf")
        if result.expansion < best["c"]:
            best.update(c=result.expansion, r=radius, surface=result.surface)
        return result.expansion

    refined = minimize_scalar(objective, bounds=(lo, hi), method="bounded",
                              options={"xatol": settings.radius_tolerance})
    c_min, surface, rbar = best["c"], best["surface"], best["r"]
    # What the finite bracket leaves: c is quadratic about the minimum, so the curvature from
    # the marched samples times the bracket tolerance squared bounds it.
    curvature = _second_difference(radii[-3:], cs[-3:])
    err = abs(curvature) * settings.radius_tolerance**2 + settings.tolerance
    notes = [f"minimiser {'converged' if refined.success else 'stopped'}"]
    if settings.truncation_check:
        coarse = solve(rbar, surface, c_min, lmax=settings.lmax - 2)
        if coarse.converged:
            err += abs(coarse.expansion - c_min)
        else:
            notes.append(f"the l_max - 2 check did not converge ({coarse.message})")
    if failed:
        notes.append(f"{len(failed)} refinement solves failed")
    note = f"{solves} solves, " + "; ".join(notes)
    return finish(True, c_min, err, surface, rbar, f"c_min = {c_min:.6g} +- {err:.2g} / M at mean radius {rbar:.5g} M ({note})")


def _replace_lmax(settings: ConstantExpansionSettings, lmax: int) -> ConstantExpansionSettings:
    return replace(settings, lmax=lmax)


def _second_difference(r, c) -> float:
    """d^2 c / d rbar^2 from three samples (non-uniform spacing)."""
    (r0, r1, r2), (c0, c1, c2) = r, c
    return 2.0 * ((c2 - c1) / (r2 - r1) - (c1 - c0) / (r1 - r0)) / (r2 - r0)
