"""What the worker measures on a found surface beyond the finder's own numbers: the basic
measures as a plain dict, the approximate-Killing-vector spin with the spin-axis circumferences
and multipoles, the principal stability eigenvalue, and the error bars. Each part is guarded on
its own: a part that cannot be measured leaves NaN and a note, never losing the surface.
Plain functions of a surface and its data (units as in SurfaceQuantities).
"""

from __future__ import annotations

import numpy as np

from ..numerics.slices import Slice
from ..numerics.surfaces import Surface

__all__ = ["ERROR_BAR_SOURCES", "MULTIPOLE_N_MAX", "STABILITY_LMAX_DROP", "basic_quantities", "error_bars",
           "quoted_measurements", "spin_measurement", "spin_quantities", "stability_quantities"]


def basic_quantities(q) -> dict:
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


def spin_quantities(surface: Surface, data, order: int) -> tuple[dict, list[str]]:
    """AKV spin, circumferences about the spin axis and multipoles of a found surface.

    Each part is guarded on its own: a failure leaves its quantities NaN and adds a note, so a
    surface the finder converged to is never lost to a measurement of what a practitioner quotes.
    Units as in SurfaceQuantities (J in M^2, masses and lengths in M, the rest dimensionless).
    """
    out, notes, _ = spin_measurement(surface, data, order)
    return out, notes


def spin_measurement(surface: Surface, data, order: int) -> tuple[dict, list[str], dict | None]:
    """:func:`spin_quantities`, and the measurement the error bars start from
    (:func:`numerics.error_bars.measurement_of`; None when a part of it failed)."""
    from ..numerics.circumferences import axis_circumferences, spin_from_circumference_ratio
    from ..numerics.error_bars import measurement_of
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
        return out, notes, None
    circ = moments = None
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
    measured = measurement_of(spin, moments, circ) if circ is not None and moments is not None else None
    return out, notes, measured


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


def error_bars(surface: Surface, data: Slice, order: int, measured: dict | None = None) -> tuple[dict, list[str]]:
    """``<name>_error`` for the quantities of :data:`ERROR_BAR_SOURCES` (same units as the value),
    from :func:`numerics.error_bars.quote_horizon` on the cropped slice; NaN and a note when it
    cannot be estimated (e.g. l_max < 3). ``measured``: the surface's own measurement at
    ``order`` from :func:`spin_measurement` (not made twice), or None."""
    from ..numerics.error_bars import quote_horizon

    out = {f"{name}_error": ([_NAN] * (MULTIPOLE_N_MAX + 1) if name in _PER_INDEX else _NAN)
           for name in ERROR_BAR_SOURCES}
    try:
        quoted = quote_horizon(surface, data, order=order, n_max=MULTIPOLE_N_MAX, measured=measured)
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


def stability_quantities(surface: Surface, data, order: int) -> tuple[dict, list[str]]:
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


def quoted_measurements(surface: Surface, measured_in, data: Slice, order: int) -> tuple[dict, list[str]]:
    """Everything quoted for a found surface beyond the basic measures: spin (with circumferences
    and multipoles), stability, error bars; and the notes of the parts that could not be made.

    ``measured_in``: where spin and stability are measured (the find's prepared geometry, or the
    slice); ``data``: the cropped slice the error bars re-measure on; ``order``: the interpolation
    order the error bars compare at.
    """
    quantities, notes, measured = spin_measurement(surface, measured_in, order)
    stability, stability_notes = stability_quantities(surface, measured_in, order)
    quantities.update(stability)
    notes.extend(stability_notes)
    if getattr(measured_in, "order", order) != order:
        measured = None  # measured at another interpolation order than the error bars compare at
    errors, error_notes = error_bars(surface, data, order, measured)
    quantities.update(errors)
    notes.extend(error_notes)
    return quantities, notes
