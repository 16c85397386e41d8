"""Finder jobs: what a worker process receives and returns, and the function it runs.

A job carries only the sub-box of the slice around its surface (:func:`crop_slice`), never
the whole slice, and only the fields the finder reads, so pickling it to a worker stays cheap. :func:`run_surface_job` is a plain
function of the job (no server state), runnable in any process or on a distributed engine.
"""

from __future__ import annotations

import time
import traceback
from dataclasses import dataclass, field

import numpy as np

from ..numerics.slices import Patch, Slice, optional_fields
from ..numerics.surfaces import Surface
# Re-exported: the worker's measurements moved to quoted_quantities.py (tests and inner_jobs use them here).
from .quoted_quantities import (ERROR_BAR_SOURCES, MULTIPOLE_N_MAX, STABILITY_LMAX_DROP, basic_quantities,  # noqa: F401
                                error_bars, quoted_measurements, spin_measurement, spin_quantities,
                                stability_quantities)

__all__ = [
    "REASON_FOUND",
    "REASON_NOT_CONVERGED",
    "REASON_NO_CANDIDATE",
    "REASON_OUTSIDE_DATA",
    "REASON_WORKER_FAILED",
    "REASON_NOT_SEARCHED",
    "REASON_NEEDS_EXCISED_DATA",
    "SurfaceJob",
    "SurfaceOutcome",
    "crop_slice",
    "keep_freed_memory",
    "run_surface_job",
    "warm_up",
]

# SurfaceNotFound.Reason values of the proto (checked against it in the tests); 0 means found.
REASON_FOUND = 0
REASON_NOT_CONVERGED = 1
REASON_NO_CANDIDATE = 2
REASON_OUTSIDE_DATA = 3
REASON_WORKER_FAILED = 4
REASON_NOT_SEARCHED = 5
REASON_NEEDS_EXCISED_DATA = 6

#: Interpolation order of the service's finds. Not the finder's more accurate default (6):
#: order-6 stencils with their difference stencils need about 13 shared node planes where two
#: boxes of one level meet (e.g. two ranks' boxes), and at narrower seams the points fall back
#: to order 4, whose different truncation error there spoils Newton's convergence. Order 4
#: needs 9. Runs whose boxes overlap widely can ask for 6 (ServerOptions.interpolation_order).
SERVICE_INTERPOLATION_ORDER = 4


def crop_slice(slice_: Slice, lower, upper, *, ghost_nodes: int, keep_gauge: bool = False) -> Slice | None:
    """The part of ``slice_`` inside the box [lower, upper], widened by ``ghost_nodes`` per side.

    Each patch is cut to the nodes covering the box plus ``ghost_nodes`` (the interpolation
    and finite-difference stencils reach that far), clipped to the patch; patches that miss
    the box are dropped. Field arrays of the result are contiguous copies of the sub-boxes.
    The gauge fields (lapse, shift: the server's tracking reads them, the finder never) are
    left out unless ``keep_gauge`` (a fifth less to copy and send for a slice carrying a shift).
    Returns None when no patch overlaps the box.
    """
    skipped = () if keep_gauge else optional_fields(slice_.variable_set)
    lower = np.asarray(lower, dtype=float)
    upper = np.asarray(upper, dtype=float)
    patches = []
    for patch in slice_.patches:
        n = np.asarray(patch.shape)
        first = np.floor((lower - patch.origin) / patch.spacing).astype(int) - ghost_nodes
        last = np.ceil((upper - patch.origin) / patch.spacing).astype(int) + ghost_nodes
        first = np.clip(first, 0, n - 1)
        last = np.clip(last, 0, n - 1)
        if np.any(last - first < 1):
            continue  # misses the box, or touches it in fewer than two nodes along an axis
        cut = tuple(slice(int(a), int(b) + 1) for a, b in zip(first, last))
        fields = {name: np.ascontiguousarray(arr[cut]) for name, arr in patch.fields.items() if name not in skipped}
        patches.append(
            Patch(
                origin=patch.origin + first * patch.spacing,
                spacing=patch.spacing,
                shape=tuple(int(b - a + 1) for a, b in zip(first, last)),
                level=patch.level,
                fields=fields,
                memory_order="C",
            )
        )
    if not patches:
        return None
    return Slice(time=slice_.time, iteration=slice_.iteration, variable_set=slice_.variable_set, patches=tuple(patches),
                 excised_spheres=slice_.excised_spheres)


@dataclass(frozen=True, eq=False)
class SurfaceJob:
    """One surface to look for in one slice.

    Attributes:
        label: the surface's label.
        data: the cropped slice (sub-box around the surface).
        lmax, tolerance, max_iterations, interpolation_order: finder settings.
        lmax_cap: highest degree the finder may raise the surface to when the residual between
            the nodes says it is not resolved (None: ``lmax``, no raising). A surface solved at a
            raised degree is measured at it and reported truncated to ``lmax`` (the archive
            keeps each surface at one degree); the message says so.
        seed: a starting surface (e.g. the previous result, moved to the forecast position);
            None when nothing is known yet.
        extra_seeds: further starting surfaces tried, in order, when the seed does not
            converge (before the scan), e.g. a sphere enclosing both bodies for a common
            horizon.
        scan_centre, scan_radii: where to scan coordinate spheres for a sign change of the mean
            expansion when there is no seed or the seed does not converge: centre (3,) and
            (r_min, r_max), units of M.
        max_candidates: scan candidates tried, outermost first.
        fallback_to_flow: on a failed Newton solve run the fast flow (finder option).
        may_not_exist: the surface may not exist yet in this slice (a common horizon before it
            formed): when no starting surface leads to a MOTS although the data covered every
            one of them, the outcome is "no candidate" with a message starting
            :data:`~penumbra_server.numerics.guesses.NO_TRAPPED_SURFACE_YET`, not "not
            converged"; iterates that wander off the data on the way count as that too (the
            surface they chased does not exist). A starting surface the data does not cover is
            still "outside data".
        relocate: when every seed and the scan failed, look for the body about the peaks of the
            metric's volume factor near a forecast (a body lost after skipped slices; see
            :mod:`penumbra_server.server.relocation`; after skipped slices every find is judged
            there too); None: no such fallback.
    """

    label: str
    data: Slice
    lmax: int
    tolerance: float
    max_iterations: int
    interpolation_order: int = SERVICE_INTERPOLATION_ORDER
    seed: Surface | None = None
    extra_seeds: tuple[Surface, ...] = ()
    scan_centre: np.ndarray | None = None
    scan_radii: tuple[float, float] | None = None
    max_candidates: int = 3
    fallback_to_flow: bool = True
    #: Search inside this surface instead (the inner common MOTS inside the common horizon),
    #: from ``seed`` (its previous solution) when given, else from inward seeds of this surface.
    inside_of: Surface | None = None
    #: The inner surface's previous solution in the displacement representation (preferred
    #: over ``seed``, which is only its star-shaped form).
    displaced_seed: object | None = None
    lmax_cap: int | None = None
    may_not_exist: bool = False
    relocate: "Relocation | None" = None
    #: Another search of the same slice waits for this one (SurfacePlan.leads): dispatched first.
    leads: bool = False
    #: Leave spin, stability and error bars of a found surface to a job of their own
    #: (:mod:`.measure_jobs`): the outcome comes back with the basic measures and ``unmeasured``
    #: set, so a search waiting for the surface starts while the measurements run on another worker.
    measure_apart: bool = False


@dataclass(frozen=True, eq=False)
class SurfaceOutcome:
    """What a worker returns: small, picklable, plain numbers.

    ``found`` with ``reason == REASON_FOUND``, or not found with a reason and a message.
    Quantities are NaN where not found (or where the measurement could not be made).
    """

    label: str
    found: bool
    reason: int
    status: int
    message: str
    method: str = ""
    centre: np.ndarray | None = None
    lmax: int = 0
    coefficients: np.ndarray | None = None
    quantities: dict[str, float | list[float]] = field(default_factory=dict)
    residual_max: float = float("nan")
    iterations: int = 0
    wall_time_s: float = 0.0
    guess: str = ""
    residual_max_between_nodes: float = float("nan")
    #: A surface found in the displacement representation (numerics.displaced.DisplacedSurface),
    #: None otherwise; ``coefficients`` then hold its star-shaped form when it has one, else NaN.
    displaced: object | None = None
    #: Found by a ``measure_apart`` job: the surface at the degree it was solved at, whose spin,
    #: stability and error bars are still to be measured (:mod:`.measure_jobs`); None otherwise.
    unmeasured: Surface | None = None
    #: On the server only: the measurement job of an ``unmeasured`` surface, not yet run.
    measurement: object | None = None

    @classmethod
    def failed(cls, label: str, message: str, *, wall_time_s: float = 0.0) -> "SurfaceOutcome":
        return cls(label=label, found=False, reason=REASON_WORKER_FAILED, status=-1, message=message,
                   wall_time_s=wall_time_s)


def run_surface_job(job: SurfaceJob) -> SurfaceOutcome:
    """Look for one surface: the seed first, then scan candidates; measure what converges.

    Never raises: an unexpected error becomes an outcome with REASON_WORKER_FAILED, so one bad
    job cannot take the run down.
    """
    start = time.perf_counter()
    run_in_worker = getattr(job, "run_in_worker", None)
    if callable(run_in_worker):  # another kind of worker job (server/formation.py); it never raises
        return run_in_worker()
    try:
        if job.inside_of is not None:
            from .inner_jobs import run_inner_job

            return run_inner_job(job, start)
        return _run(job, start)
    except Exception as exc:  # a worker must report, not crash the pool
        tail = traceback.format_exc(limit=3).strip().splitlines()[-1]
        return SurfaceOutcome.failed(job.label, f"finder raised {type(exc).__name__}: {exc} ({tail})",
                                     wall_time_s=time.perf_counter() - start)


def _run(job: SurfaceJob, start: float) -> SurfaceOutcome:
    from ..numerics.finder import NEEDS_EXCISED_DATA, OUTSIDE_DATA, FinderSettings, find_surface
    from ..numerics.guesses import NO_TRAPPED_SURFACE_YET, sphere_scan_profile
    from ..numerics.measures import measure_surface
    from .relocation import SkipJudge, relocation_guesses

    settings = FinderSettings(
        lmax=job.lmax,
        lmax_cap=None if job.lmax_cap is None else max(int(job.lmax_cap), job.lmax),
        tolerance=job.tolerance,
        max_iterations=job.max_iterations,
        interpolation_order=job.interpolation_order,
        fallback_to_flow=job.fallback_to_flow,
    )
    attempts: list[tuple[str, Surface]] = []
    if job.seed is not None:
        attempts.append(("previous", job.seed))
    attempts.extend(("alternative", extra) for extra in job.extra_seeds)
    last = None
    total_iterations = 0
    tried_scan = job.scan_centre is None
    tried_relocation = job.relocate is None
    scan_message = ""
    uncovered_starts = 0  # starting surfaces the data does not cover
    rejected: list[str] = []
    judge = SkipJudge(job.relocate, job.data) if job.relocate is not None and job.relocate.skipped else None
    index = 0
    while True:
        while index == len(attempts) and not (tried_scan and tried_relocation):
            if not tried_scan:
                tried_scan = True
                r_min, r_max = job.scan_radii
                scan = sphere_scan_profile(job.data, job.scan_centre, r_min, r_max, order=job.interpolation_order)
                scan_message = scan.message
                attempts.extend(("scan", Surface.sphere(job.scan_centre, r, job.lmax))
                                for r in scan.candidates[: job.max_candidates])
            elif not tried_relocation:
                tried_relocation = True
                attempts.extend(relocation_guesses(job.relocate, job.data, job.seed, job.lmax,
                                                   order=job.interpolation_order))
        if index == len(attempts) or (judge is not None and judge.complete):
            if judge is not None and judge.candidates:
                kind, result, quantities, message = judge.pick()
                return _found(job, kind, result, quantities, message, total_iterations, start)
            break
        kind, guess = attempts[index]
        index += 1
        result = find_surface(job.data, guess, settings=settings)
        total_iterations += result.nit
        last = (kind, result)
        if result.surface is None:
            uncovered_starts += 1
        if result.success:
            # Measured at the degree solved (reported at the job's degree: see _found).
            measured_in = result.geometry if result.geometry is not None else job.data
            try:
                quantities = basic_quantities(measure_surface(result.surface, measured_in,
                                                              order=job.interpolation_order))
                message = result.message
            except ValueError as exc:
                quantities = {}
                message = f"{result.message}; not measured: {exc}"
            if judge is not None:
                # After skipped slices a find may be another body's horizon, or a common one:
                # the judge keeps it as a candidate and picks once every body was seen.
                judge.consider(kind, result, quantities, message)
                continue
            return _found(job, kind, result, quantities, message, total_iterations, start)
    if judge is not None:
        rejected.extend(judge.rejected)
    elapsed = time.perf_counter() - start
    if last is None:
        r_min, r_max = job.scan_radii if job.scan_radii else (float("nan"), float("nan"))
        c = job.scan_centre if job.scan_centre is not None else np.full(3, np.nan)
        return SurfaceOutcome(
            label=job.label, found=False, reason=REASON_NO_CANDIDATE, status=-1,
            message=scan_message or (f"no sign change of the expansion of coordinate spheres about "
                                     f"({c[0]:.4g}, {c[1]:.4g}, {c[2]:.4g}) with radii {r_min:.4g}..{r_max:.4g} M"),
            wall_time_s=elapsed, guess="scan",
        )
    kind, result = last
    not_accepted = f"; not accepted: {'; '.join(rejected)}" if rejected else ""
    if job.may_not_exist and uncovered_starts == 0 and result.status != NEEDS_EXCISED_DATA and not rejected:
        return SurfaceOutcome(
            label=job.label, found=False, reason=REASON_NO_CANDIDATE, status=result.status,
            message=(f"{NO_TRAPPED_SURFACE_YET}: no MOTS from {len(attempts)} starting surface(s), each covered "
                     f"by the data (last, from {kind}: {result.message})"),
            method=result.method, residual_max=result.residual_max, iterations=total_iterations,
            wall_time_s=elapsed, guess=kind, residual_max_between_nodes=float(result.residual_max_between_nodes),
        )
    reason = {OUTSIDE_DATA: REASON_OUTSIDE_DATA, NEEDS_EXCISED_DATA: REASON_NEEDS_EXCISED_DATA}.get(
        result.status, REASON_NOT_CONVERGED)
    return SurfaceOutcome(
        label=job.label, found=False, reason=reason, status=-1 if result.success else result.status,
        message=f"{len(attempts)} guess(es) tried, last from {kind}: {result.message}{not_accepted}",
        method=result.method, residual_max=result.residual_max, iterations=total_iterations,
        wall_time_s=elapsed, guess=kind, residual_max_between_nodes=float(result.residual_max_between_nodes),
    )


def _found(job: SurfaceJob, kind: str, result, quantities: dict, message: str, total_iterations: int,
           start: float) -> SurfaceOutcome:
    """The outcome of a find: spin, stability and error bars measured as well, at the degree the
    surface was solved at (unless the job leaves them to a measurement job of their own:
    ``measure_apart``); reported (coefficients) at the job's degree, the archive's."""
    solved = result.surface
    surface = solved.with_lmax(job.lmax) if solved.lmax > job.lmax else solved
    if solved.lmax > job.lmax:
        message = (f"{message}; solved at l_max {solved.lmax} (raised from {job.lmax}: not resolved "
                   f"at {job.lmax}), measured there, coefficients reported up to l = {job.lmax}")
    if not job.measure_apart:
        measured_in = result.geometry if result.geometry is not None else job.data
        quoted, notes = quoted_measurements(solved, measured_in, job.data, job.interpolation_order)
        quantities.update(quoted)
        if notes:
            message = "; ".join([message, *notes])
    return SurfaceOutcome(
        label=job.label,
        found=True,
        reason=REASON_FOUND,
        status=result.status,
        message=message,
        method=result.method,
        centre=np.array(surface.centre),
        lmax=surface.lmax,
        coefficients=np.array(surface.coefficients),
        quantities=quantities,
        residual_max=result.residual_max,
        iterations=total_iterations,
        wall_time_s=time.perf_counter() - start,
        guess=kind,
        residual_max_between_nodes=float(result.residual_max_between_nodes),
        unmeasured=solved if job.measure_apart else None,
    )


def keep_freed_memory() -> bool:
    """Ask glibc's allocator of this (worker) process to keep freed memory in its heap: no mmap
    for large blocks and no trimming. A find's temporary arrays reach tens of MB at l_max 24
    (quadrature bases, Galerkin products); mapped afresh each time, every page of them faults on
    first touch again (measured: a common-horizon job's measurement 3.0 -> 2.5 s CPU, the first
    job of a worker 4.2 -> 3.9 s). The heap then stays at the process's peak. Returns whether it
    took effect (glibc only; elsewhere nothing changes)."""
    import ctypes

    try:
        libc = ctypes.CDLL("libc.so.6")
    except OSError:
        return False
    m_trim_threshold, m_mmap_max = -1, -4  # glibc's mallopt parameters (malloc.h)
    return bool(libc.mallopt(m_mmap_max, 0)) and bool(libc.mallopt(m_trim_threshold, 2**30))


def warm_up(delay_s: float = 0.0) -> tuple[int, dict[str, str | None]]:
    """Import the numerics in a fresh worker, the measurements too (so the first real job does not
    pay for it: about 0.4 s for the measurement modules alone).

    Returns the worker's pid and its BLAS/OpenMP thread settings (the executor checks them).
    """
    import os

    from ..numerics import (circumferences, constant_expansion, displaced_finder, error_bars, finder,  # noqa: F401
                            guesses, inner_mots, killing, measures, multipoles, stability)

    keep_freed_memory()

    if delay_s:
        time.sleep(delay_s)
    names = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")
    return os.getpid(), {name: os.environ.get(name) for name in names}
