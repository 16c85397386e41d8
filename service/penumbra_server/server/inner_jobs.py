"""The worker's side of an inner common MOTS search (``SurfaceJob.inside_of`` set): follow the
previous solution in the displacement representation, or seed inward from this slice's common
horizon. Plain function of the job, like :func:`.jobs.run_surface_job`.

The outcome carries the MOTS in the displacement representation (``SurfaceOutcome.displaced``)
and its star-shaped form when it has one (else NaN coefficients): the inner common MOTS soon
stops being star-shaped. Its quantities come from the displacement form: area, irreducible
mass, area-weighted coordinate centroid, coordinate radii about it and the principal eigenvalue
of the stability operator (with the same error estimate as every other surface's: the change
when psi's degree drops by 2); the others stay NaN.
"""

from __future__ import annotations

import time

import numpy as np

from ..numerics.displaced import DisplacedSurface, coordinate_extent, reference_from_star
from ..numerics.displaced_finder import DisplacedSettings
from ..numerics.displaced_stability import displaced_stability_spectra
from ..numerics.inner_mots import find_inner_common, follow_inner
from ..numerics.sources import as_tracked_source
from ..numerics.surfaces import coefficient_count
from .jobs import REASON_FOUND, REASON_NOT_CONVERGED, STABILITY_LMAX_DROP, SurfaceJob, SurfaceOutcome

__all__ = ["run_inner_job"]


def run_inner_job(job: SurfaceJob, start: float) -> SurfaceOutcome:
    """The inner common MOTS inside ``job.inside_of`` (units of M)."""
    settings = DisplacedSettings(tolerance=job.tolerance, max_iterations=job.max_iterations,
                                 interpolation_order=job.interpolation_order)
    outer = job.inside_of
    source = as_tracked_source(job.data, order=job.interpolation_order)
    previous = job.displaced_seed
    if previous is None and job.seed is not None:
        previous = DisplacedSurface.at_reference(reference_from_star(job.seed), job.lmax)
    result, guess = None, ""
    if previous is not None:
        result, guess = follow_inner(source, previous, label=job.label, outer=outer, settings=settings,
                                     star_lmax=job.lmax), "previous"
    if result is None or not result.success:
        common = job.label[: -len("_inner")] if job.label.endswith("_inner") else job.label
        result, guess = find_inner_common(source, outer, label=common, settings=settings, lmax=outer.lmax,
                                          star_lmax=job.lmax), "inward from the common horizon"
    elapsed = time.perf_counter() - start
    if not result.success:
        return SurfaceOutcome(label=job.label, found=False, reason=REASON_NOT_CONVERGED, status=result.status,
                              message=result.message, method="displacement", residual_max=float(result.residual_max),
                              wall_time_s=elapsed, guess=guess)
    extent = coordinate_extent(result.displaced, source)
    quantities = {"area": result.area, "irreducible_mass": float(np.sqrt(result.area / (16 * np.pi))),
                  "centroid": list(extent.centroid), "radius_min": extent.radius_min,
                  "radius_mean": extent.radius_mean, "radius_max": extent.radius_max}
    stability, note = _stability(result.displaced, source, job.interpolation_order)
    quantities.update(stability)
    if result.star is not None:
        centre, coefficients = np.array(result.star.centre), np.array(result.star.coefficients)
    else:
        centre, coefficients = np.array(extent.centroid), np.full(coefficient_count(job.lmax), np.nan)
    return SurfaceOutcome(label=job.label, found=True, reason=REASON_FOUND, status=result.status,
                          message=f"{result.message} (from {guess}){note}", method="displacement", centre=centre,
                          lmax=job.lmax, coefficients=coefficients, quantities=quantities,
                          residual_max=float(result.residual_max), iterations=result.attempts,
                          wall_time_s=time.perf_counter() - start, guess=guess, displaced=result.displaced)


def _stability(surface: DisplacedSurface, source, order: int) -> tuple[dict, str]:
    """Principal stability eigenvalue (1/M^2) of the displaced surface and its error estimate;
    NaN and a note (appended to the message) when it cannot be computed: the surface stays found."""
    out = {"stability_eigenvalue": float("nan"), "stability_eigenvalue_error": float("nan")}
    try:
        lower = surface.lmax - STABILITY_LMAX_DROP
        degrees = [surface.lmax, lower] if lower >= 1 else [surface.lmax]
        spectra = displaced_stability_spectra(surface, source, degrees, order=order)
        value = spectra[0].principal_eigenvalue
        out["stability_eigenvalue"] = value
        if len(spectra) > 1:
            out["stability_eigenvalue_error"] = abs(value - spectra[1].principal_eigenvalue)
    except Exception as exc:  # an eigenvalue that cannot be made must not lose the surface
        return out, f"; stability not computed: {type(exc).__name__}: {exc}"
    return out, ""
