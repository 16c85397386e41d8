"""The finder's status table, settings and result (see :mod:`.finder` for the solver)."""

from __future__ import annotations

from dataclasses import dataclass, field

from .interpolation import DEFAULT_ORDER, SUPPORTED_ORDERS
from .sources import TrackedSource
from .surfaces import Surface

__all__ = [
    "FinderSettings",
    "FindResult",
    "STATUS_MESSAGES",
    "SUCCESS_STATUSES",
    "CONVERGED",
    "CONVERGED_AT_TRUNCATION",
    "MAX_ITERATIONS",
    "DIVERGED",
    "OUTSIDE_DATA",
    "LINE_SEARCH_FAILED",
    "UNRESOLVED",
    "TOO_FEW_POINTS",
    "INVALID_GEOMETRY",
    "NEEDS_EXCISED_DATA",
    "CONVERGED_AT_INTERPOLATION_FLOOR",
    "NON_FINITE_DATA",
]

CONVERGED = 0
CONVERGED_AT_TRUNCATION = 1
MAX_ITERATIONS = 2
DIVERGED = 3
OUTSIDE_DATA = 4
LINE_SEARCH_FAILED = 5
UNRESOLVED = 6
TOO_FEW_POINTS = 7
INVALID_GEOMETRY = 8
NEEDS_EXCISED_DATA = 9
CONVERGED_AT_INTERPOLATION_FLOOR = 10
NON_FINITE_DATA = 11


#: Status code -> meaning. ``success`` is True exactly for codes 0, 1 and 10.
STATUS_MESSAGES: dict[int, str] = {
    CONVERGED: "converged: max |Theta| at the nodes and between them is below the tolerance",
    CONVERGED_AT_TRUNCATION: (
        "converged at the l_max cap: the projected residual is below the tolerance; the residual "
        "between the nodes is above it and above the data's interpolation floor, so truncation of the "
        "surface expansion limits it, but it is within the truncation tolerance"
    ),
    MAX_ITERATIONS: "not converged: iteration cap reached",
    DIVERGED: "diverged: the radius became non-positive or ran away from the guess",
    OUTSIDE_DATA: "not converged: the surface needs data no patch provides",
    LINE_SEARCH_FAILED: "not converged: no damped step reduced the residual",
    UNRESOLVED: (
        "not resolved at the l_max cap: the projected residual vanished but max |Theta| times the mean "
        "radius exceeds the truncation tolerance and the data's interpolation floor"
    ),
    TOO_FEW_POINTS: "not accepted: the surface spans too few grid points across to be resolved by the data",
    INVALID_GEOMETRY: "not converged: the metric is not positive definite (or Theta not finite) on the surface",
    NEEDS_EXCISED_DATA: "not converged: the surface needs data inside an excised region",
    CONVERGED_AT_INTERPOLATION_FLOOR: (
        "converged to the data's interpolation floor: the projected residual is below the tolerance and "
        "the residual left at and between the nodes is at the level of the data's interpolation error, "
        "which no l_max removes"
    ),
    NON_FINITE_DATA: "not converged: the data the surface needs holds NaN or infinity outside any excised region",
}
SUCCESS_STATUSES = (CONVERGED, CONVERGED_AT_TRUNCATION, CONVERGED_AT_INTERPOLATION_FLOOR)
_METHODS = ("newton", "flow")


@dataclass(frozen=True)
class FinderSettings:
    """Options of :func:`find_surface`.

    Attributes:
        lmax: highest harmonic degree of the surface (common practice: 8-16 for individual
            horizons, more for a freshly formed common horizon).
        tolerance: max |Theta| to reach, units 1/M (common practice: 1e-8 to 1e-10).
        max_iterations: Newton iterations (flow iterations are ``flow_iterations``).
        method: "newton" or "flow".
        interpolation_order: interpolation nodes per axis for grid data (even; default 6, chosen
            by measurement: DEVELOPERS.md, "The finder").
        lmax_cap: highest l_max the finder may raise to on its own when the residual between
            the nodes says the surface is not resolved (None: ``lmax``, no raising).
        fallback_to_flow: on a failed Newton solve, run the flow from the guess and polish.
        flow_iterations: cap on flow iterations.
        flow_alpha, flow_beta: fast-flow parameters (Gundlach 1998; defaults from memory).
        max_radius_factor: a surface whose largest radius exceeds this multiple of the guess's
            mean radius counts as diverged.
        truncation_tolerance: a surface converged only in the projection (status 1) is accepted
            while max |Theta| (at and between the nodes) times its mean radius stays below this
            (dimensionless; roughly the relative error of the surface position). Our choice, not
            a published value.
        min_points_across: on grid data, the smallest coordinate diameter must span at least
            this many spacings of the patches serving the surface (common practice asks for
            tens across a horizon; this is a floor that rejects grid artefacts).
    """

    lmax: int = 10
    tolerance: float = 1e-9
    max_iterations: int = 40
    method: str = "newton"
    interpolation_order: int = DEFAULT_ORDER
    lmax_cap: int | None = None
    fallback_to_flow: bool = True
    flow_iterations: int = 600
    flow_alpha: float = 1.0
    flow_beta: float = 0.5
    max_radius_factor: float = 20.0
    truncation_tolerance: float = 1e-2
    min_points_across: float = 4.0

    def __post_init__(self) -> None:
        if self.method not in _METHODS:
            raise ValueError(f"method: expected one of {_METHODS}, got {self.method!r}")
        if self.lmax < 1:
            raise ValueError(f"lmax: expected an integer >= 1, got {self.lmax}")
        if not self.tolerance > 0:
            raise ValueError(f"tolerance: expected a positive number, got {self.tolerance}")
        if self.max_iterations < 1 or self.flow_iterations < 1:
            raise ValueError("max_iterations and flow_iterations: expected integers >= 1")
        if self.interpolation_order not in SUPPORTED_ORDERS:
            raise ValueError(f"interpolation_order: expected one of {SUPPORTED_ORDERS}, got {self.interpolation_order}")
        if self.lmax_cap is not None and self.lmax_cap < self.lmax:
            raise ValueError(f"lmax_cap: expected None or an integer >= lmax ({self.lmax}), got {self.lmax_cap}")

    @property
    def effective_lmax_cap(self) -> int:
        return self.lmax if self.lmax_cap is None else int(self.lmax_cap)


@dataclass(frozen=True)
class FindResult:
    """Outcome of one find.

    Attributes:
        surface: the last iterate (the MOTS when ``success``), or None if no iterate could be
            evaluated.
        success: True for status 0 or 1.
        status: a key of :data:`STATUS_MESSAGES`.
        message: the status meaning plus specifics.
        nit: iterations taken.
        residual_max_history, residual_rms_history: max and rms of Theta (1/M) at the nodes,
            one entry per evaluated iterate.
        geometry_evaluations: how many times fields were interpolated at a point set.
        wall_time_s: seconds spent.
        method: "newton", "flow" or "newton+flow" (Newton failed, flow then Newton polish).
        projected_residual: rms of the Galerkin-projected Theta (1/M) at the last iterate.
        residual_max_between_nodes: max |Theta| (1/M) of the last iterate on a second, finer
            node set. The collocation nodes can hide truncation error (for a symmetric surface
            the projection conditions pin Theta to zero at every node); this one does not.
        interpolation_floor: estimated max |Theta| error (1/M) from interpolating the data, on
            the same finer node set: the largest difference of Theta computed with the settings'
            interpolation order and the next supported one (order + 2, or order - 2 at the top;
            the latter over-estimates). 0 for exact data, NaN when not estimated.
        recentred: the expansion centre was moved to the surface's centroid during the find.
        geometry: the geometry source the find used (grid nodes already prepared); pass it to
            :func:`~.measures.measure_surface` as ``data`` to reuse them.
    """

    surface: Surface | None
    success: bool
    status: int
    message: str
    nit: int
    residual_max_history: tuple[float, ...]
    residual_rms_history: tuple[float, ...]
    geometry_evaluations: int
    wall_time_s: float
    method: str
    projected_residual: float = float("nan")
    residual_max_between_nodes: float = float("nan")
    interpolation_floor: float = float("nan")
    recentred: bool = False
    geometry: TrackedSource | None = field(default=None, repr=False, compare=False)

    @property
    def residual_max(self) -> float:
        """Last max |Theta| (1/M), NaN if nothing was evaluated."""
        return self.residual_max_history[-1] if self.residual_max_history else float("nan")
