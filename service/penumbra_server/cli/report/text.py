"""The report as text: ``summary.txt`` and what `penumbra report` prints: the slices, each
surface's last found values, the tracks with the forecasts' measured error against the later
track, the common-horizon event, and the guidance (updates, when the regions merged, the final
remnant region).

One pure function, :func:`summary_text`, of a :class:`~.numbers.RunSummary`. Units: M for
lengths, times and masses, M^2 for areas, s for wall-clock figures.
"""

from __future__ import annotations

import math

from penumbra_server.cli.safe_text import terminal_safe

from .numbers import RunSummary

__all__ = ["summary_text"]


def _fmt(value, spec: str = ".6f") -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return format(value, spec)


def summary_text(summary: RunSummary) -> str:
    """A plain-text account of the run (units: M for lengths, times and masses, M^2 for areas)."""
    lines = [
        f"run {summary.run_id}  name {terminal_safe(summary.name)!r}  state {summary.state}",
        f"slices: {summary.slices_total} final ({summary.slices_processed} processed, "
        f"{summary.slices_skipped} skipped, {summary.slices_failed} failed)"
        + (f"; time {summary.time_range[0]:.3f} .. {summary.time_range[1]:.3f} M" if summary.time_range else ""),
        f"median latency arrival -> last result: {_fmt(summary.median_latency_s, '.2f')} s",
    ]
    if summary.skipped_iterations:
        lines.append("skipped iterations: " + ", ".join(str(i) for i in summary.skipped_iterations))
    if summary.common_label is not None:
        lines.append(
            f"common horizon ({summary.common_label}) first found at t = {summary.common_first_time:.4f} M, "
            f"iteration {summary.common_first_iteration}"
        )
    elif summary.merged_labels:
        lines.append(f"common horizon: looked for ({', '.join(summary.merged_labels)}) but never found")
    else:
        lines.append("common horizon: not looked for in this run")
    lines.append("")
    header = (f"{'surface':<10} {'found':>9} {'first t':>9} {'last t':>9} {'area':>10} {'M_irr':>9} "
              f"{'centroid (x, y, z)':>29} {'|Theta|max':>10} {'wall s':>7}")
    lines.append(header)
    for s in summary.surfaces:
        centroid = "(" + ", ".join(_fmt(v, "+.4f") for v in s.final_centroid) + ")"
        lines.append(
            f"{s.label:<10} {f'{s.found}/{s.attempts}':>9} {_fmt(s.first_found_time, '.3f'):>9} "
            f"{_fmt(s.last_found_time, '.3f'):>9} {_fmt(s.final_area, '.5f'):>10} "
            f"{_fmt(s.final_irreducible_mass, '.5f'):>9} {centroid:>29} {_fmt(s.final_residual_max, '.1e'):>10} "
            f"{_fmt(s.median_wall_time_s, '.2f'):>7}"
        )
    lines.append("")
    lines.append("areas and masses: last found value of each surface; M_irr = sqrt(A / 16 pi).")
    lines.extend(_tracking_lines(summary))
    # The run's display name comes from whoever opened it: nothing in it may drive a terminal.
    return "\n".join(terminal_safe(line) for line in lines) + "\n"


def _vec_text(values, spec: str = "+.3f") -> str:
    return "(" + ", ".join(_fmt(float(v), spec) for v in values) + ")"


def _tracking_lines(summary: RunSummary) -> list[str]:
    """The tracks, forecasts, common-horizon event and guidance, as text lines."""
    lines: list[str] = []
    if summary.tracks:
        lines += ["", "tracks (the server's; lengths and times in M):"]
        for t in summary.tracks:
            text = (f"  {t.label}: {t.horizon_points} horizon-centroid points"
                    + (f" (t = {t.first_time:.3f} .. {t.last_time:.3f})" if t.first_time is not None else ""))
            if t.puncture_points:
                text += (f"; {t.puncture_points} puncture points integrated from the shift (order {t.puncture_order}, "
                         f"stated error at the end {_fmt(t.puncture_final_uncertainty, '.2e')}, at most "
                         f"{_fmt(t.puncture_offset_max, '.4f')} from the centroid)")
            lines.append(text)
            if t.forecasts:
                models = ", ".join(f"{n} {m}" for m, n in t.models)
                text = f"    {t.forecasts} forecasts ({models})"
                if t.check is not None:
                    c = t.check
                    text += (f"; against the later track: median error {c.median_error:.2e}, max {c.max_error:.2e} "
                             f"over {c.comparisons} comparisons, within the stated uncertainty in "
                             f"{c.covered} of {c.with_uncertainty}")
                lines.append(text)
    if summary.common_event_time is not None:
        lines += ["", f"common horizon formed (server event) at t = {summary.common_event_time:.4f} M, iteration "
                      f"{summary.common_event_iteration}: {summary.common_event_message}"]
    g = summary.guidance
    if g is not None:
        lines += ["", f"refinement guidance (advisory: the evolution decides): {g.updates} updates, "
                      f"t = {g.first_time:.3f} .. {g.last_time:.3f} M, nesting depth {g.final.nesting_depth}"]
        if g.merged_spans:
            spans = ", ".join(f"{a:.3f}" if a == b else f"{a:.3f}-{b:.3f}" for a, b in g.merged_spans)
            lines.append(f"  finest regions of the bodies merged into one region at t = {spans} M "
                         f"(first at iteration {g.merged_first_iteration})")
        else:
            lines.append("  finest regions of the bodies never merged before merger")
        if g.post_merger_time is not None:
            lines.append(f"  after merger: a single region around the remnant from t = {g.post_merger_time:.3f} M "
                         f"(iteration {g.post_merger_iteration})")
        f = g.final
        lines.append(f"  latest (t = {f.time:.3f} M, iteration {f.iteration}, valid {f.valid_from:.3f} .. "
                     f"{f.valid_until:.3f} M{', post-merger' if f.post_merger else ''}):")
        for b in f.bodies:
            kind = "remnant" if f.post_merger else ("merged region " + "+".join(b.region_bodies) if b.merged else "own region")
            lines.append(f"    {b.label}: finest level {b.finest_level} ({kind}), centre {_vec_text(b.centre)}, "
                         f"radius {b.radius:.4f}, spacing {b.spacing:.5f}, box {_vec_text(b.lower)} .. {_vec_text(b.upper)}")
    if summary.window_updates:
        lines += ["", f"data windows: {summary.window_updates} updates"]
    if summary.tracks or g is not None:
        lines.append(f"warnings: {len(summary.warnings)}" + ("" if not summary.warnings else
                     "; " + " | ".join(summary.warnings[:5]) + (" ..." if len(summary.warnings) > 5 else "")))
    return lines
