"""Penumbra's numerics core: slices, geometry at points, surfaces, the expansion, the finder,
measurements and reference spacetimes. Pure functions on numpy arrays; no grpc, no zarr."""

from .excision import EXCISION_MASK_FIELD, ExcisedDataError, ExcisedSphere
from .finder import STATUS_MESSAGES, FinderSettings, FindResult, expansion_of, find_surface
from .geometry import PointGeometry
from .inner_mots import InsideBody, InsideResult, find_mots_inside, follow_inner
from .guesses import SphereScan, guess_from_previous, scan_spheres, sphere_scan_profile
from .interpolation import GridGeometry, grid_geometry
from .measures import SurfaceQuantities, measure_surface, surface_area
from .slices import Patch, Slice, SliceError, VariableSet, optional_fields, required_fields
from .surfaces import Surface, angular_grid

__all__ = [
    "EXCISION_MASK_FIELD",
    "ExcisedDataError",
    "ExcisedSphere",
    "STATUS_MESSAGES",
    "FinderSettings",
    "FindResult",
    "expansion_of",
    "find_surface",
    "InsideBody",
    "InsideResult",
    "find_mots_inside",
    "follow_inner",
    "PointGeometry",
    "SphereScan",
    "guess_from_previous",
    "scan_spheres",
    "sphere_scan_profile",
    "GridGeometry",
    "grid_geometry",
    "SurfaceQuantities",
    "measure_surface",
    "surface_area",
    "Patch",
    "Slice",
    "SliceError",
    "VariableSet",
    "optional_fields",
    "required_fields",
    "Surface",
    "angular_grid",
]
