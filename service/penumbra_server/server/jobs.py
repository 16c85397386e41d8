"""Finder jobs: what a worker process receives and returns, and the function it runs.

A job carries only the sub-box of the slice around its surface (:func:`crop_slice`), never
the whole slice, so pickling it to a worker stays cheap. :func:`run_surface_job` is a plain
function of the job (no server state), runnable in any process or on a distributed engine.
"""

from __future__ import annotations

import time
import traceback
from dataclasses import dataclass, field

import numpy as np

from ..numerics.slices import Patch, Slice
from ..numerics.surfaces import Surface

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


def crop_slice(slice_: Slice, lower, upper, *, ghost_nodes: int) -> Slice | None:
    """The part of ``slice_`` inside the box [lower, upper], widened by ``ghost_nodes`` per side.

    Each patch is cut to the nodes covering the box plus ``ghost_nodes`` (the interpolation
    and finite-difference stencils reach that far), clipped to the patch; patches that miss
    the box are dropped. Field arrays of the result are contiguous copies of the sub-boxes.
    Returns None when no patch overlaps the box.
    """
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
        fields = {name: np.ascontiguousarray(arr[cut]) for name, arr in patch.fields.items()}
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
    relocate: "Relocation | None" = None


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

    @classmethod
    def failed(cls, label: str, message: str, *, wall_time_s: float = 0.0) -> "SurfaceOutcome":
        return cls(label=label, found=False, reason=REASON_WORKER_FAILED, status=-1, message=message,
                   wall_time_s=wall_time_s)


def _quantities_dict(q) -> dict:
    return {
        "area": float(q.area),
        "irreducible_mass": float(q.irreducible_mass),
        "centroid": [float(v) for v in q.centroid],
        "radius_min": float(q.radius_min),
        "radius_mean": float(q.radius_mean),
        "radius_max": float(q.radius_max),
        "resolution_indicator": float(q.resolution_indicator),
        "angular_momentum": [float(v) for v in q.angular_momentum],
        "christodoulou_mass": float(q.christodoulou_mass),
    }


#: Highest multipole order reported (index n = 0 .. MULTIPOLE_N_MAX on the wire and in the archive).
MULTIPOLE_N_MAX = 8

_NAN = float("nan")


def _spin_quantities(surface: Surface, data, order: int) -> tuple[dict, list[str]]:
    """AKV spin, circumferences about the spin axis and multipoles of a found surface.

    Each part is guarded on its own: a failure leaves its quantities NaN and adds a note, so a
    surface the finder converged to is never lost to a measurement of what a practitioner quotes.
    Units as in SurfaceQuantities (J in M^2, masses and lengths in M, the rest dimensionless).
    """
    from ..numerics.circumferences import axis_circumferences, spin_from_circumference_ratio
    from ..numerics.killing import horizon_spin
    from ..numerics.multipoles import horizon_multipoles

    out: dict = {
        "akv_angular_momentum": _NAN, "spin_direction": [_NAN] * 3, "dimensionless_spin": _NAN,
        "akv_christodoulou_mass": _NAN, "killing_quality": _NAN,
        "spin_equatorial_circumference": _NAN, "spin_polar_circumference": _NAN,
        "spin_circumference_ratio": _NAN, "circumference_spin": _NAN,
        "mass_multipoles": [_NAN] * (MULTIPOLE_N_MAX + 1), "spin_multipoles": [_NAN] * (MULTIPOLE_N_MAX + 1),
    }
    notes: list[str] = []
    try:
        spin = horizon_spin(surface, data, order=order)
    except Exception as exc:  # numerics raise ValueError/LinAlgError; either way the surface stays
        notes.append(f"spin not measured: {type(exc).__name__}: {exc}")
        return out, notes
    out.update(
        akv_angular_momentum=float(spin.angular_momentum),
        spin_direction=[float(v) for v in spin.direction],
        dimensionless_spin=float(spin.dimensionless_spin),
        akv_christodoulou_mass=float(spin.christodoulou_mass),
        killing_quality=float(spin.killing_eigenvalues[0]),
    )
    try:
        circ = axis_circumferences(surface, data, spin.direction, spin.centroid, order=order)
        polar = float(np.mean(circ.polar))
        out.update(spin_equatorial_circumference=float(circ.equatorial), spin_polar_circumference=polar,
                   spin_circumference_ratio=float(circ.ratio),
                   circumference_spin=spin_from_circumference_ratio(float(circ.ratio)))
    except Exception as exc:
        notes.append(f"spin-axis circumferences not measured: {type(exc).__name__}: {exc}")
    try:
        moments = horizon_multipoles(surface, data, n_max=MULTIPOLE_N_MAX, spin=spin, order=order)
        out.update(mass_multipoles=[float(v) for v in moments.mass_moments_dimensionless[: MULTIPOLE_N_MAX + 1]],
                   spin_multipoles=[float(v) for v in moments.spin_moments_dimensionless[: MULTIPOLE_N_MAX + 1]])
    except Exception as exc:
        notes.append(f"multipoles not measured: {type(exc).__name__}: {exc}")
    return out, notes


#: Quantity with an error bar (worker dict / archive name) -> QuotedHorizon attribute.
ERROR_BAR_SOURCES = {
    "area": "area",
    "irreducible_mass": "irreducible_mass",
    "akv_christodoulou_mass": "christodoulou_mass",
    "akv_angular_momentum": "angular_momentum",
    "dimensionless_spin": "dimensionless_spin",
    "centroid": "centroid",
    "spin_direction": "spin_direction",
    "spin_equatorial_circumference": "equatorial_circumference",
    "spin_polar_circumference": "polar_circumference",
    "mass_multipoles": "mass_multipoles",
    "spin_multipoles": "spin_multipoles",
}
#: Error bars carried per multipole, not as one scalar.
_PER_INDEX = ("mass_multipoles", "spin_multipoles")


def _error_bars(surface: Surface, data: Slice, order: int) -> tuple[dict, list[str]]:
    """``<name>_error`` for the quantities of :data:`ERROR_BAR_SOURCES` (same units as the value),
    from :func:`numerics.error_bars.quote_horizon` on the cropped slice; NaN and a note when it
    cannot be estimated (e.g. l_max < 3)."""
    from ..numerics.error_bars import quote_horizon

    out = {f"{name}_error": ([_NAN] * (MULTIPOLE_N_MAX + 1) if name in _PER_INDEX else _NAN)
           for name in ERROR_BAR_SOURCES}
    try:
        quoted = quote_horizon(surface, data, order=order, n_max=MULTIPOLE_N_MAX)
    except Exception as exc:  # an error bar that cannot be made must not lose the surface
        return out, [f"error bars not estimated: {type(exc).__name__}: {exc}"]
    for name, attribute in ERROR_BAR_SOURCES.items():
        error = np.asarray(getattr(quoted, attribute).error, dtype=float)
        # The centroid's error is one length (its displacement), repeated per component.
        out[f"{name}_error"] = [float(v) for v in error] if name in _PER_INDEX else float(np.max(error))
    return out, []


#: Harmonic degree of the stability operator's eigenfunction below the surface's own (the error
#: estimate compares the two degrees).
STABILITY_LMAX_DROP = 2


def _stability_quantities(surface: Surface, data, order: int) -> tuple[dict, list[str]]:
    """Principal eigenvalue of the MOTS stability operator (1/M^2) and an error estimate.

    The estimate is the change of the eigenvalue when the eigenfunction's harmonic degree drops
    by :data:`STABILITY_LMAX_DROP` (the surface itself unchanged): the truncation of psi is what
    the Galerkin solve controls; the data's own error shows up in the surface's error bars.
    NaN and a note when it cannot be computed (the surface stays found).
    """
    from ..numerics.stability import principal_eigenvalue, stability_matrices

    out = {"stability_eigenvalue": _NAN, "stability_eigenvalue_error": _NAN}
    try:
        mats = stability_matrices(surface, data, order=order)
        value = principal_eigenvalue(mats)
        out["stability_eigenvalue"] = value
        lower = surface.lmax - STABILITY_LMAX_DROP
        if lower >= 1:
            out["stability_eigenvalue_error"] = abs(value - principal_eigenvalue(mats, lower))
    except Exception as exc:  # an eigenvalue that cannot be made must not lose the surface
        return out, [f"stability not computed: {type(exc).__name__}: {exc}"]
    return out, []


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
        return _run(job, start)
    except Exception as exc:  # a worker must report, not crash the pool
        tail = traceback.format_exc(limit=3).strip().splitlines()[-1]
        return SurfaceOutcome.failed(job.label, f"finder raised {type(exc).__name__}: {exc} ({tail})",
                                     wall_time_s=time.perf_counter() - start)


def _run(job: SurfaceJob, start: float) -> SurfaceOutcome:
    from ..numerics.finder import NEEDS_EXCISED_DATA, OUTSIDE_DATA, FinderSettings, find_surface
    from ..numerics.guesses import scan_spheres
    from ..numerics.measures import measure_surface
    from .relocation import SkipJudge, relocation_guesses

    settings = FinderSettings(
        lmax=job.lmax,
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
    rejected: list[str] = []
    judge = SkipJudge(job.relocate, job.data) if job.relocate is not None and job.relocate.skipped else None
    index = 0
    while True:
        while index == len(attempts) and not (tried_scan and tried_relocation):
            if not tried_scan:
                tried_scan = True
                r_min, r_max = job.scan_radii
                radii = scan_spheres(job.data, job.scan_centre, r_min, r_max, order=job.interpolation_order)
                attempts.extend(("scan", Surface.sphere(job.scan_centre, r, job.lmax))
                                for r in radii[: job.max_candidates])
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
        if result.success:
            surface = result.surface
            # The find's prepared grid nodes serve the measurement too (numerics.measures).
            measured_in = result.geometry if result.geometry is not None else job.data
            try:
                quantities = _quantities_dict(measure_surface(surface, measured_in, order=job.interpolation_order))
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
            message=(f"no sign change of the expansion of coordinate spheres about "
                     f"({c[0]:.4g}, {c[1]:.4g}, {c[2]:.4g}) with radii {r_min:.4g}..{r_max:.4g} M"),
            wall_time_s=elapsed, guess="scan",
        )
    kind, result = last
    reason = {OUTSIDE_DATA: REASON_OUTSIDE_DATA, NEEDS_EXCISED_DATA: REASON_NEEDS_EXCISED_DATA}.get(
        result.status, REASON_NOT_CONVERGED)
    return SurfaceOutcome(
        label=job.label, found=False, reason=reason, status=-1 if result.success else result.status,
        message=(f"{len(attempts)} guess(es) tried, last from {kind}: {result.message}"
                 + (f"; not accepted: {'; '.join(rejected)}" if rejected else "")),
        method=result.method, residual_max=result.residual_max, iterations=total_iterations,
        wall_time_s=elapsed, guess=kind, residual_max_between_nodes=float(result.residual_max_between_nodes),
    )


def _found(job: SurfaceJob, kind: str, result, quantities: dict, message: str, total_iterations: int,
           start: float) -> SurfaceOutcome:
    """The outcome of a find: its spin and error bars measured as well."""
    surface = result.surface
    measured_in = result.geometry if result.geometry is not None else job.data
    spin_quantities, notes = _spin_quantities(surface, measured_in, job.interpolation_order)
    quantities.update(spin_quantities)
    stability, stability_notes = _stability_quantities(surface, measured_in, job.interpolation_order)
    quantities.update(stability)
    notes.extend(stability_notes)
    errors, error_notes = _error_bars(surface, job.data, job.interpolation_order)
    quantities.update(errors)
    notes.extend(error_notes)
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
    )


def warm_up(delay_s: float = 0.0) -> tuple[int, dict[str, str | None]]:
    """Import the numerics in a fresh worker (so the first real job does not pay for it).

    Returns the worker's pid and its BLAS/OpenMP thread settings (the executor checks them).
    """
    import os

    from ..numerics import finder, guesses, measures  # noqa: F401

    if delay_s:
        time.sleep(delay_s)
    names = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")
    return os.getpid(), {name: os.environ.get(name) for name in names}
