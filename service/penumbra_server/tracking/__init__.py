"""Tracks, forecasts, common-horizon watch, refinement guidance and data windows.

Pure numerics over numpy arrays (no gRPC, no zarr): the server's scheduler and the archive
call these. Units: G = c = 1, lengths and times in the run's mass scale M.
"""

from .common import (
    DEFAULT_COMMON_FACTOR,
    CommonSearchAdvice,
    CommonWatchError,
    common_horizon_watch,
    common_neck_point,
    common_surface_guess,
)
from .forecast import Forecast, ForecastError, centre_of_mass, forecast_polynomial
from .orbit_forecast import forecast_bodies, forecast_pair
from .guidance import (
    BodyGuidance,
    GuidanceError,
    HorizonSize,
    LevelRegion,
    RefinementGuidance,
    RefinementPolicy,
    guidance_times,
    refinement_guidance,
)
from .tracks import (
    PUNCTURE_METHODS,
    PunctureStep,
    ShiftField,
    ShiftSample,
    Track,
    TrackError,
    advance_puncture_track,
    integrate_puncture,
)
from .windows import (
    DataWindow,
    WindowError,
    merge_overlapping_windows,
    window_coverage,
)

__all__ = [
    # tracks
    "Track",
    "TrackError",
    "ShiftField",
    "ShiftSample",
    "PunctureStep",
    "PUNCTURE_METHODS",
    "integrate_puncture",
    "advance_puncture_track",
    # forecast
    "Forecast",
    "ForecastError",
    "forecast_bodies",
    "forecast_pair",
    "forecast_polynomial",
    "centre_of_mass",
    # common-horizon watch
    "CommonSearchAdvice",
    "CommonWatchError",
    "common_horizon_watch",
    "common_neck_point",
    "common_surface_guess",
    "DEFAULT_COMMON_FACTOR",
    # guidance
    "RefinementPolicy",
    "HorizonSize",
    "BodyGuidance",
    "LevelRegion",
    "RefinementGuidance",
    "GuidanceError",
    "refinement_guidance",
    "guidance_times",
    # windows
    "DataWindow",
    "WindowError",
    "merge_overlapping_windows",
    "window_coverage",
]
