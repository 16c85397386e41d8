"""The remnant: the settled values of the common horizon after merger.

Input is the common surface's time series (times in M; irreducible and Christodoulou masses,
spin vector and dimensionless spin, each with its error bar from
:mod:`penumbra_server.numerics.error_bars`). Output is the latest value of each quantity and how
well it has settled over the last stretch of time.

Criterion (our choice, stated in :class:`Remnant`): over the window of the last ``window`` M
(default 10 M, about one e-folding time of the least-damped quadrupole ringing of a Kerr remnant:
tau ~ 11-13 M for chi 0.6-0.7 (fitting formulas of Berti, Cardoso & Will, PRD 73, 064030 (2006),
docs/references.md item 20, from memory)), a quantity has settled when

    spread = max over the window of |x(t) - x(t_latest)|  <=  tolerance * error(t_latest)

(vectors: the Euclidean norm of the difference), the window is fully covered by data and holds
at least ``min_samples`` samples. The remnant is settled when every quantity is. The least-squares
slope over the window times its length (``drift``) is reported as a second figure of how much
the value is still moving.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["RemnantError", "SettledQuantity", "Remnant", "remnant", "remnant_from_rows", "remnant_from_reports",
           "remnant_line"]

_NAMES = ("irreducible_mass", "christodoulou_mass", "dimensionless_spin", "spin_vector")


class RemnantError(ValueError):
    """Bad input to :func:`remnant`; the message names the field."""


@dataclass(frozen=True, eq=False)
class SettledQuantity:
    """Latest value of one quantity and how far it still moves.

    Attributes:
        value: latest value (float, or (3,) for the spin vector); units of the input.
        error: its error bar (same shape as ``value``; vectors: per component).
        spread: max |x(t) - value| over the window (vectors: norm of the difference).
        drift: |least-squares slope| over the window times its length (vectors: norm).
        ratio: spread / (tolerance-free) error scale: spread / max(error) (inf if the error is 0
            and the spread is not).
        settled: spread <= tolerance * max(error), the window covered and with enough samples.
    """

    value: float | np.ndarray
    error: float | np.ndarray
    spread: float
    drift: float
    ratio: float
    settled: bool


@dataclass(frozen=True, eq=False)
class Remnant:
    """Settled values of the remnant.

    Attributes:
        irreducible_mass, christodoulou_mass (M), dimensionless_spin, spin_vector (M^2, (3,)):
            :class:`SettledQuantity` each.
        window: (t_start, t_end) of the stretch examined (M).
        samples: samples in the window.
        settled: every quantity settled.
        criterion: the rule applied, in words, with the numbers used.
    """

    irreducible_mass: SettledQuantity
    christodoulou_mass: SettledQuantity
    dimensionless_spin: SettledQuantity
    spin_vector: SettledQuantity
    window: tuple[float, float]
    samples: int
    settled: bool
    criterion: str


def _column(series, name: str, n: int, vector: bool) -> np.ndarray:
    values = np.asarray(series, dtype=float)
    shape = (n, 3) if vector else (n,)
    if values.shape != shape:
        raise RemnantError(f"{name}: expected shape {shape}, got {values.shape}")
    return values


def _settle(values, errors, t, keep, tolerance, covered, enough, vector) -> SettledQuantity:
    latest, latest_error = values[-1], errors[-1]
    window_values, window_t = values[keep], t[keep]
    diff = window_values - latest
    spread = float(np.max(np.linalg.norm(diff, axis=1) if vector else np.abs(diff)))
    if window_t.size >= 2 and np.ptp(window_t) > 0:
        centred = window_t - window_t.mean()
        slope = (centred @ (window_values - window_values.mean(axis=0))) / (centred @ centred)
        drift = float(np.linalg.norm(np.atleast_1d(slope)) * np.ptp(window_t))
    else:
        drift = float("inf")
    scale = float(np.max(latest_error))
    ratio = spread / scale if scale > 0 else (0.0 if spread == 0 else float("inf"))
    settled = bool(covered and enough and spread <= tolerance * scale)
    if vector:
        value, error = np.array(latest), np.array(latest_error)
        value.setflags(write=False)
        error.setflags(write=False)
    else:
        value, error = float(latest), float(latest_error)
    return SettledQuantity(value, error, spread, drift, ratio, settled)


def remnant(
    times,
    values: dict,
    errors: dict,
    *,
    window: float = 10.0,
    tolerance: float = 1.0,
    min_samples: int = 5,
) -> Remnant:
    """Latest settled values of the common horizon.

    Args:
        times: (n,) coordinate times of the common surface's rows, increasing (M). Rows where it
            was not found should be left out by the caller.
        values: {"irreducible_mass": (n,), "christodoulou_mass": (n,), "dimensionless_spin": (n,),
            "spin_vector": (n, 3)}.
        errors: the same keys and shapes: each value's error bar (>= 0).
        window: length of the last stretch examined (M, > 0).
        tolerance: settled when the spread is at most ``tolerance`` error bars (> 0).
        min_samples: fewest samples the window must hold (>= 2).
    """
    t = np.asarray(times, dtype=float)
    if t.ndim != 1 or t.size == 0 or not np.all(np.isfinite(t)):
        raise RemnantError(f"times: expected a non-empty 1-D array of finite times, got shape {t.shape}")
    if np.any(np.diff(t) <= 0):
        raise RemnantError("times: expected strictly increasing times")
    if not (np.isfinite(window) and window > 0):
        raise RemnantError(f"window: expected a positive time in M, got {window!r}")
    if not (np.isfinite(tolerance) and tolerance > 0):
        raise RemnantError(f"tolerance: expected a positive number, got {tolerance!r}")
    if int(min_samples) < 2:
        raise RemnantError(f"min_samples: expected an integer >= 2, got {min_samples!r}")
    for kind, given in (("values", values), ("errors", errors)):
        missing = [k for k in _NAMES if k not in given]
        if missing:
            raise RemnantError(f"{kind}: missing {', '.join(missing)}")
    n = t.size
    t_end = float(t[-1])
    t_start = t_end - float(window)
    keep = t >= t_start - 1e-12 * max(1.0, abs(t_end))
    covered = bool(t[0] <= t_start + 1e-12 * max(1.0, abs(t_end)))
    enough = int(keep.sum()) >= int(min_samples)
    settled = {}
    for name in _NAMES:
        vector = name == "spin_vector"
        v = _column(values[name], f"values[{name!r}]", n, vector)
        e = _column(errors[name], f"errors[{name!r}]", n, vector)
        if np.any(~(e >= 0)):
            raise RemnantError(f"errors[{name!r}]: expected error bars >= 0")
        settled[name] = _settle(v, e, t, keep, tolerance, covered, enough, vector)
    criterion = (f"settled when, over the last {window:g} M (t = {t_start:.6g} to {t_end:.6g} M, "
                 f"{int(keep.sum())} samples, at least {int(min_samples)} needed"
                 + ("" if covered else "; NOT covered: the series starts later") +
                 f"), every quantity stays within {tolerance:g} error bar(s) of its latest value")
    return Remnant(**settled, window=(t_start, t_end), samples=int(keep.sum()),
                   settled=all(q.settled for q in settled.values()), criterion=criterion)


def remnant_from_rows(times, irreducible_mass, christodoulou_mass, dimensionless_spin, angular_momentum,
                      spin_direction, errors: dict, **options) -> Remnant:
    """:func:`remnant` from per-row columns as archived or reported (found rows only, time order):
    J (M^2) about the unit ``spin_direction`` (n, 3) gives the spin vector; ``errors`` holds
    "irreducible_mass", "christodoulou_mass", "dimensionless_spin" and "angular_momentum" error
    bars (n,), the last used for every component of the spin vector. Rows with a non-finite
    value or error are left out. ``options``: as for :func:`remnant`."""
    t = np.asarray(times, dtype=float)
    j = np.asarray(angular_momentum, dtype=float)
    direction = np.asarray(spin_direction, dtype=float).reshape(-1, 3)
    values = {"irreducible_mass": np.asarray(irreducible_mass, dtype=float),
              "christodoulou_mass": np.asarray(christodoulou_mass, dtype=float),
              "dimensionless_spin": np.asarray(dimensionless_spin, dtype=float),
              "spin_vector": j[:, None] * direction}
    bars = {"irreducible_mass": np.asarray(errors["irreducible_mass"], dtype=float),
            "christodoulou_mass": np.asarray(errors["christodoulou_mass"], dtype=float),
            "dimensionless_spin": np.asarray(errors["dimensionless_spin"], dtype=float),
            "spin_vector": np.repeat(np.asarray(errors["angular_momentum"], dtype=float)[:, None], 3, axis=1)}
    keep = np.isfinite(t)
    for name in _NAMES:
        for array in (values[name], bars[name]):
            keep &= np.all(np.isfinite(array.reshape(t.size, -1)), axis=1)
    return remnant(t[keep], {k: v[keep] for k, v in values.items()}, {k: v[keep] for k, v in bars.items()},
                   **options)


def remnant_from_reports(reports, **options) -> Remnant:
    """:func:`remnant_from_rows` from found-surface reports in time order (objects with the
    attributes of the shim's ``SurfaceReport``: time, irreducible_mass, akv_christodoulou_mass,
    dimensionless_spin, akv_angular_momentum, spin_direction and their ``*_error``)."""
    nan = float("nan")

    def column(name):
        return [getattr(r, name, nan) for r in reports]

    return remnant_from_rows(column("time"), column("irreducible_mass"), column("akv_christodoulou_mass"),
                             column("dimensionless_spin"), column("akv_angular_momentum"),
                             [list(getattr(r, "spin_direction", (nan,) * 3)) for r in reports],
                             {"irreducible_mass": column("irreducible_mass_error"),
                              "christodoulou_mass": column("akv_christodoulou_mass_error"),
                              "dimensionless_spin": column("dimensionless_spin_error"),
                              "angular_momentum": column("akv_angular_momentum_error")}, **options)


def remnant_line(r: Remnant, label: str) -> str:
    """One line for ``watch``, ``summary.txt`` and the report: the latest values with their error
    bars and how well each has settled (spread over the window in error bars; settled at <= the
    tolerance)."""

    def pm(q: SettledQuantity, spec: str) -> str:
        return f"{format(q.value, spec)} +- {q.error:.1e}"

    def moved(q: SettledQuantity) -> str:
        return f"{q.ratio:.2g}" if np.isfinite(q.ratio) else "inf"

    j = r.spin_vector.value
    magnitude = float(np.linalg.norm(j))
    axis = "(-)" if magnitude == 0 else "(" + ", ".join(f"{v / magnitude:+.3f}" for v in j) + ")"
    return (f"remnant ({label}): {'settled' if r.settled else 'NOT settled'} over t = {r.window[0]:.3f} .. "
            f"{r.window[1]:.3f} M ({r.samples} samples): M_irr {pm(r.irreducible_mass, '.6f')} M, "
            f"M_chr {pm(r.christodoulou_mass, '.6f')} M, chi {pm(r.dimensionless_spin, '.5f')}, spin axis {axis}; "
            f"spread over the window in error bars: M_irr {moved(r.irreducible_mass)}, "
            f"M_chr {moved(r.christodoulou_mass)}, chi {moved(r.dimensionless_spin)}, J {moved(r.spin_vector)}")
