"""Write a report: read the archive, compute its numbers, draw the plots, write ``summary.txt``.

Only the order of the steps and the file names live here; each step is a function of
:mod:`.loading`, :mod:`.numbers`, :mod:`.plots` or :mod:`.text`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from penumbra_server.cli.cross_sections import PLANES
from penumbra_server.cli.progress import Progress
from penumbra_server.cli.safe_text import terminal_safe

from .formation import formation_lines, plot_formation
from .loading import load_run
from .numbers import RunSummary, default_section_times, snap_times, summarise
from .plots import plot_areas_masses, plot_cross_sections, plot_guidance, plot_tracks
from .mots import plot_mots, stability_lines
from .multipoles import plot_multipoles
from .spin import plot_spin, spin_lines
from .text import summary_text

__all__ = ["ReportResult", "write_report"]


@dataclass(frozen=True)
class ReportResult:
    """Files a report wrote and the summary it computed.

    ``limits``: plot file name -> the coordinate ranges its panels show, for the tracks and
    guidance plots (see :class:`~.plots.PlotInfo`). ``figures``: plot file name -> the matplotlib
    figure it was drawn on (what was plotted can be read back from its axes).
    """

    output_dir: Path
    plots: tuple[Path, ...]
    summary_path: Path
    summary: RunSummary
    section_times: tuple[float, ...] = field(default_factory=tuple)
    limits: dict = field(default_factory=dict)
    figures: dict = field(default_factory=dict, compare=False, repr=False)


def write_report(archive_path, output_dir, *, times=None, plane: str = "xy",
                 progress: Progress | None = None) -> ReportResult:
    """Read the archive, write the plots and ``summary.txt`` into ``output_dir``.

    Args:
        archive_path: ``<archive_root>/<run_id>.zarr``.
        output_dir: created if missing.
        times: coordinate times (M) for the cross-sections, each snapped to the nearest slice
            with a found surface; default :func:`~.numbers.default_section_times`.
        plane: orbital plane for tracks, guidance and cross-sections ("xy", "xz" or "yz").
    """
    if plane not in PLANES:
        raise ValueError(f"plane: expected one of {', '.join(PLANES)}, got {plane!r}")
    progress = progress or Progress("report", 10)
    output_dir = Path(output_dir)
    output_dir.mkdir(parents=True, exist_ok=True)
    record = load_run(archive_path)
    summary = summarise(record)
    progress.step(f"read {record.run_id}: {len(record.surfaces)} surfaces, {summary.slices_total} slices, "
                  f"{len(record.tracks)} tracks")
    section_times = snap_times(record, times) if times else default_section_times(record, summary)
    drawn = []
    for draw in (lambda: plot_areas_masses(record, summary, output_dir / "areas_masses.png"),
                 lambda: plot_tracks(record, summary, output_dir / "tracks.png", plane=plane),
                 lambda: plot_guidance(record, summary, output_dir / "guidance.png", plane=plane),
                 lambda: plot_cross_sections(record, section_times, output_dir / "cross_sections.png", plane=plane),
                 lambda: plot_spin(record, summary, output_dir / "spin.png"),
                 lambda: plot_mots(record, summary, output_dir / "mots.png"),
                 lambda: plot_formation(record, summary, output_dir / "formation.png"),
                 lambda: plot_multipoles(record, summary, output_dir / "multipoles.png")):
        drawn.append(draw())
        progress.step(drawn[-1].path.name)
    limits = {info.path.name: info.limits for info in drawn if info.path.name in ("tracks.png", "guidance.png")}
    summary_path = output_dir / "summary.txt"
    # Labels come from the run's opener: nothing in them may drive a terminal.
    extra = [*spin_lines(record, summary), *stability_lines(record), *formation_lines(record, summary)]
    summary_path.write_text(summary_text(summary) + "".join(terminal_safe(line) + "\n" for line in extra))
    progress.step(summary_path.name)
    progress.finish(f"wrote {len(drawn)} plots and a summary to {output_dir}")
    return ReportResult(output_dir, tuple(info.path for info in drawn), summary_path, summary, section_times, limits,
                        figures={info.path.name: info.figure for info in drawn})
