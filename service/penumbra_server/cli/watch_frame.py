"""The frame `penumbra watch` draws: a pure function of what the server reports
(:func:`render_frame`): the header with the run's counters, the table of surfaces, the common
horizon line, the formation forecast, the remnant, the refinement guidance table, recent skips
and warnings, and the legend. Every line is made terminal-safe.
"""

from __future__ import annotations

import math
import time
from typing import Mapping

from penumbra_server.cli.safe_text import terminal_safe
from penumbra_server.cli.watch_progress import RunProgress

__all__ = ["COLUMNS", "GUIDANCE_COLUMNS", "render_frame", "formation_line", "surface_rows", "guidance_rows"]

_NAN = float("nan")


def _num(value, spec: str) -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return "-"
    return format(v, spec) if math.isfinite(v) else "-"


def _vec(values, spec: str = "+.3f") -> str:
    try:
        parts = [float(v) for v in values]
    except TypeError:
        return "-"
    if len(parts) != 3 or not all(math.isfinite(v) for v in parts):
        return "-"
    return "(" + ", ".join(format(v, spec) for v in parts) + ")"


def _pm(value, error, spec: str) -> str:
    """``value +-error`` (the error in 2 significant digits), or the value alone without an error."""
    text = _num(value, spec)
    err = _num(error, ".1e")
    return text if text == "-" or err == "-" else f"{text} +-{err}"


COLUMNS = ("surface", "latest attempt", "found at t [M]", "area [M^2]", "M_irr [M]", "M_chr [M]", "chi",
           "chi (C_p/C_e)", "spin axis", "centre (x, y, z) [M]", "|Theta|max [1/M]", "lag [M] / [s]")


def surface_rows(states: Mapping[str, object], *, body_labels=(), newest_time: float = _NAN) -> list[list[str]]:
    """Table rows, one per surface, from the shim's ``SurfaceState`` objects.

    Bodies come first in spec order, then other surfaces (e.g. a common horizon). Numbers are
    those of the latest *found* surface; the state column says whether the latest attempt found it.
    """
    order = [l for l in body_labels if l in states] + sorted(l for l in states if l not in body_labels)
    rows = []
    for label in order:
        state = states[label]
        found = getattr(state, "latest_found", None)
        attempted = int(getattr(state, "latest_attempt_iteration", -1))
        if attempted < 0:
            status = "waiting"
        elif getattr(state, "latest_attempt_found", False):
            status = f"found (it {attempted})"
        else:
            misses = int(getattr(state, "consecutive_misses", 0))
            status = f"NOT FOUND (it {attempted}, {misses} miss{'es' if misses != 1 else ''})"
        if found is None:
            rows.append([label, status] + ["-"] * (len(COLUMNS) - 2))
            continue
        t = float(found.time)
        behind = newest_time - t if math.isfinite(newest_time) else _NAN
        rows.append([
            label,
            status,
            f"{_num(t, '.3f')} (it {found.iteration})",
            _pm(found.area, getattr(found, "area_error", _NAN), ".5f"),
            _pm(found.irreducible_mass, getattr(found, "irreducible_mass_error", _NAN), ".5f"),
            _pm(getattr(found, "akv_christodoulou_mass", _NAN), getattr(found, "akv_christodoulou_mass_error", _NAN),
                ".5f"),
            _pm(getattr(found, "dimensionless_spin", _NAN), getattr(found, "dimensionless_spin_error", _NAN), ".4f"),
            _num(getattr(found, "circumference_spin", _NAN), ".3f"),
            _vec(getattr(found, "spin_direction", ()), "+.2f"),
            _vec(found.centroid),
            _num(found.residual_max, ".1e"),
            f"{_num(behind, '.3f')} / {_num(found.latency_s, '.2f')}",
        ])
    return rows


GUIDANCE_COLUMNS = ("guidance for", "finest level", "centre (x, y, z) [M]", "radius [M]", "spacing [M]", "region")


def guidance_rows(guidance) -> list[list[str]]:
    """Table rows of a ``penumbra_shim.Guidance``: one per body (the remnant after merger) with
    its recommended finest region; the region column names the bodies a merged region covers."""
    levels = len(getattr(guidance, "levels", ()) or ())
    rows = []
    for body in getattr(guidance, "bodies", ()):
        try:
            region = guidance.region_of(body.label)
            covered = tuple(region.bodies)
        except (KeyError, ValueError):
            region, covered = None, (body.label,)
        if getattr(guidance, "post_merger", False):
            where = "remnant"
        elif len(covered) > 1:
            where = "merged " + "+".join(covered) + (f" (radius {_num(region.radius, '.4f')})" if region is not None else "")
        else:
            where = "own"
        rows.append([body.label, f"{body.finest_level} of {levels}" if levels else str(body.finest_level),
                     _vec(body.centre), _num(body.finest_radius, ".4f"), _num(body.finest_spacing, ".5f"), where])
    return rows


def _table(columns, rows) -> list[str]:
    widths = [max([len(columns[i])] + [len(r[i]) for r in rows]) for i in range(len(columns))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(columns, widths)).rstrip(), "  ".join("-" * w for w in widths)]
    lines.extend("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows)
    return lines


def _common_line(progress: RunProgress, states: Mapping[str, object], body_labels) -> str:
    c = progress.common_formed
    if c is not None:
        return (f"common horizon: formed at t = {c.time:.3f} M (iteration {c.iteration}), surface {c.label!r}, "
                f"bodies {c.separation:.3f} M apart, M_irr {c.irreducible_mass:.4f} M")
    found = [l for l, s in states.items() if l not in body_labels and getattr(s, "latest_found", None) is not None]
    if found:  # formed, but the event lies before the part of the log this view read
        return f"common horizon: found ({', '.join(found)}); time of formation not in the events read"
    return "common horizon: not formed yet"


def formation_line(progress: RunProgress) -> str | None:
    """The newest formation forecast (c_min and when it reaches zero), or None without one."""
    f = progress.formation
    if f is None:
        return None
    head = f"formation forecast (from t = {f.time:.3f} M): "
    c = (f"c_min = {_pm(f.c_min, f.c_min_error, '.5f')} /M" if f.c_min_found
         else f"c_min not found in that slice ({str(f.message)[:80]})")
    if f.forecast_available:
        when = (f"common horizon expected at t = {_pm(f.formation_time, f.formation_time_uncertainty, '.3f')} M "
                f"(from {f.based_on} slices)")
    else:
        when = "no formation time yet"
    return head + c + "; " + when


def _remnant_text(progress: RunProgress, body_labels) -> str:
    """The remnant line (tracking.remnant) from the common surface's found events; "" before
    the common horizon formed."""
    from penumbra_server.tracking.remnant import remnant_from_reports, remnant_line

    c = progress.common_formed
    label = getattr(c, "label", None) if c is not None else None
    if label is None:
        others = [l for l in progress.found if l not in body_labels]
        if not others:
            return ""
        label = others[0]
    # One row per slice time (the newest report of a time wins: a replayed event adds nothing).
    reports = sorted({float(r.time): r for r in progress.found.get(label, [])}.values(), key=lambda r: float(r.time))
    if not reports:
        return f"remnant ({label}): no found surface among the events read yet"
    try:
        r = remnant_from_reports(reports)
    except ValueError as exc:  # too few rows with error bars
        return f"remnant ({label}): not assessed: {exc}"
    return remnant_line(r, label)


def render_frame(info, states: Mapping[str, object], progress: RunProgress | None = None, *,
                 guidance=None, now_unix_s: float | None = None, server: str = "") -> str:
    """One screenful describing a run.

    Args:
        info: the shim's ``RunInfo``.
        states: label -> ``SurfaceState`` (the server's latest state per tracked surface).
        progress: what the event stream said (newest processed slice, recent skips, the common
            horizon's formation).
        guidance: the latest ``penumbra_shim.Guidance`` (None: none yet).
        now_unix_s: wall clock for the header (default: now).
        server: address shown in the header.
    """
    progress = progress or RunProgress()
    now = time.time() if now_unix_s is None else now_unix_s
    spec = getattr(info, "spec", None)
    body_labels = tuple(getattr(b, "label", "") for b in (getattr(spec, "bodies", ()) or ()))
    received = int(getattr(info, "slices_received", 0))
    processed = int(getattr(info, "slices_processed", 0))
    skipped = int(getattr(info, "slices_skipped", 0))
    duplicate = int(getattr(info, "slices_duplicate", 0))
    queued = max(received - processed - skipped, 0)
    received_time = float(getattr(info, "last_received_time", _NAN))
    received_iteration = int(getattr(info, "last_received_iteration", -1))
    # The evolution's position as the server knows it: newest received, else newest processed.
    evolution_time = received_time if math.isfinite(received_time) else progress.newest_time
    lines = [
        f"penumbra watch  {getattr(info, 'run_id', '?')}  {terminal_safe(getattr(info, 'name', ''))!r}  "
        f"state {getattr(info, 'state', '?')}  {server}".rstrip(),
        time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(now))
        + f"  slices: received {received}, processed {processed}, skipped {skipped}, queued {queued}"
        + (f", duplicates {duplicate}" if duplicate else ""),
        ("newest slice received: "
         + (f"t = {received_time:.3f} M, iteration {received_iteration}" if received_iteration >= 0 else "none yet")
         + ";  newest processed: "
         + (f"t = {progress.newest_time:.3f} M, iteration {progress.newest_iteration}, "
            f"arrival -> archived {_num(progress.last_latency_s, '.2f')} s"
            if progress.newest_iteration >= 0 else "none yet")),
        "",
    ]
    rows = surface_rows(states, body_labels=body_labels, newest_time=evolution_time)
    if not rows:
        rows = [[label, "waiting"] + ["-"] * (len(COLUMNS) - 2) for label in body_labels]
    lines.extend(_table(COLUMNS, rows))
    lines.append("")
    lines.append(_common_line(progress, states, body_labels))
    forecast = formation_line(progress)
    if forecast is not None:
        lines.append(forecast)
    remnant_text = _remnant_text(progress, body_labels)
    if remnant_text:
        lines.append(remnant_text)
    if guidance is None:
        lines.append("refinement guidance: none yet")
    else:
        lines.append(f"refinement guidance (advisory: the evolution decides) from t = {guidance.time:.3f} M "
                     f"(iteration {guidance.iteration}), valid {guidance.valid_from:.3f} .. {guidance.valid_until:.3f} M"
                     + (", after merger" if guidance.post_merger else "") + ":")
        lines.extend("  " + line for line in _table(GUIDANCE_COLUMNS, guidance_rows(guidance)))
    if progress.skips or progress.warnings:
        lines.append("")
        lines.extend(progress.skips[-5:])
        lines.extend(progress.warnings[-3:])
    lines.append("")
    lines.append("+-: error estimates (numerics/error_bars.py); M_chr, chi, spin axis: approximate-Killing-vector spin;")
    lines.append("chi (C_p/C_e): the spin Kerr would have with this polar / equatorial circumference ratio.")
    lines.append("lag: newest slice received minus the time the surface was last found [M] / "
                 "arrival-to-archived wall time [s]. Results and guidance are advisory.")
    # Names, labels and reasons come from the run's opener and the server: nothing in them may
    # drive the terminal.
    return "\n".join(terminal_safe(line) for line in lines) + "\n"
