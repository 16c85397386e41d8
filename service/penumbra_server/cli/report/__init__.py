"""`penumbra report`: turn a run's archive into PNG plots and a text summary.

The package's modules, one job each: :mod:`.loading` reads the archive into an
:class:`ArchivedRun` of plain columns; :mod:`.numbers` and :mod:`.guidance` derive the figures
(pure functions); :mod:`.text` writes them as ``summary.txt``; :mod:`.plots` draws
``areas_masses.png``, ``tracks.png``, ``guidance.png``, ``cross_sections.png``, (:mod:`.spin`) ``spin.png``,
(:mod:`.mots`) ``mots.png``, (:mod:`.formation`) ``formation.png`` and (:mod:`.multipoles`) ``multipoles.png``;
:mod:`.write` runs the steps in order.

Surfaces labelled like a body of the run spec are individual horizons; any other label is a
surface the server looked for beyond the bodies (the common horizon of a merging pair).
Guidance is advisory: the report shows what the server recommended, not what a run did.
"""

from .guidance import BodyRegion, GuidanceSummary, GuidanceUpdate, guidance_updates
from .loading import ArchivedRun, load_run
from .numbers import (ForecastCheck, RunSummary, SurfaceComparison, SurfaceSummary, TrackSummary, compare_surfaces,
                      default_section_times, forecast_check, summarise)
from .plots import (PlotInfo, chosen_forecasts, cone_path, default_guidance_choice, plot_areas_masses,
                    plot_cross_sections, plot_guidance, plot_tracks)
from .mots import plot_mots, stability_lines, stability_series
from .multipoles import multipole_series, plot_multipoles
from .spin import plot_spin, spin_lines, spin_series
from .text import summary_text
from .write import ReportResult, write_report

__all__ = [
    "ArchivedRun",
    "BodyRegion",
    "ForecastCheck",
    "GuidanceSummary",
    "GuidanceUpdate",
    "PlotInfo",
    "ReportResult",
    "RunSummary",
    "SurfaceComparison",
    "SurfaceSummary",
    "TrackSummary",
    "chosen_forecasts",
    "compare_surfaces",
    "cone_path",
    "default_guidance_choice",
    "default_section_times",
    "forecast_check",
    "guidance_updates",
    "load_run",
    "plot_areas_masses",
    "plot_cross_sections",
    "plot_guidance",
    "plot_mots",
    "plot_spin",
    "plot_multipoles",
    "multipole_series",
    "plot_tracks",
    "spin_lines",
    "spin_series",
    "stability_lines",
    "stability_series",
    "summarise",
    "summary_text",
    "write_report",
]
