"""A run's spec on the server side: validated once from the wire, with defaults filled in.

Conversion to and from the wire message and from the archive's ``run_spec`` attribute (a
restarted server re-opens runs from it).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from penumbra_shim._wire import horizons_pb2 as pb

from ..numerics.excision import ExcisedSphere
from ..numerics.slices import VariableSet
from ..tracking.guidance import RefinementPolicy
from .errors import ServiceError

__all__ = [
    "BodySpec",
    "RunSettings",
    "DEFAULT_LMAX",
    "DEFAULT_TOLERANCE",
    "DEFAULT_MAX_ITERATIONS",
    "DEFAULT_QUEUE_DEPTH",
    "DEFAULT_PART_DEADLINE_S",
    "DEFAULT_REFINEMENT",
    "refinement_from_wire",
    "refinement_to_wire",
    "symmetry_from_wire",
    "shift_gauge_from_wire",
    "excised_spheres_from_wire",
    "excised_spheres_to_wire",
    "variable_set_from_wire",
    "variable_set_to_wire",
]

DEFAULT_LMAX = 8
#: A freshly formed common horizon needs a higher degree than the individual ones (common
#: practice; the demo pair's common surface at d = 0.735 M is accepted from l_max 16 on).
DEFAULT_LMAX_COMMON = 16
#: Default cap of the finder's own l_max raising (spec.finder.lmax_cap 0): max(this, lmax_common).
#: 24 resolves a common horizon formed at the critical separation of Brill-Lindquist pairs with
#: mass ratios up to 4 about its neck (DEVELOPERS.md, "Common horizons from the neck"); beyond
#: that the cost grows as l_max^4.
DEFAULT_LMAX_CAP = 24
DEFAULT_TOLERANCE = 1e-8  # 1/M; common practice is 1e-8 to 1e-10 (docs/references.md item 15)
DEFAULT_MAX_ITERATIONS = 40
DEFAULT_QUEUE_DEPTH = 4
#: Seconds the server waits for the missing parts of a slice sent in parts, from its first part.
DEFAULT_PART_DEADLINE_S = 60.0
#: Longest part deadline a spec may ask for (a day): pending parts hold memory.
MAX_PART_DEADLINE_S = 86400.0
MAX_LMAX = 32
MAX_BODIES = 16
MAX_QUEUE_DEPTH = 1024
MAX_NESTING_DEPTH = 16
MAX_EXCISED_SPHERES = 64
#: The refinement policy's defaults (common practice; see tracking.guidance.RefinementPolicy).
DEFAULT_REFINEMENT = RefinementPolicy()

_LABEL = re.compile(r"^[A-Za-z0-9_-]{1,32}$")

_VARIABLE_SETS = {
    pb.VARIABLE_SET_ADM: VariableSet.ADM,
    pb.VARIABLE_SET_CONFORMAL_CHI: VariableSet.CONFORMAL_CHI,
    pb.VARIABLE_SET_CONFORMAL_W: VariableSet.CONFORMAL_W,
    pb.VARIABLE_SET_CONFORMAL_PHI: VariableSet.CONFORMAL_PHI,
}
_VARIABLE_SETS_BACK = {v: k for k, v in _VARIABLE_SETS.items()}


def variable_set_from_wire(value: int, field: str) -> VariableSet:
    """The numerics variable set of a wire enum value; INVALID_ARGUMENT naming ``field``."""
    try:
        return _VARIABLE_SETS[value]
    except KeyError:
        allowed = ", ".join(pb.VariableSet.Name(k) for k in _VARIABLE_SETS)
        shown = pb.VariableSet.Name(value) if value in pb.VariableSet.values() else str(value)
        raise ServiceError.invalid(f"{field}: unknown variable set {shown}; expected one of {allowed}") from None


def variable_set_to_wire(value: VariableSet) -> int:
    return _VARIABLE_SETS_BACK[VariableSet.parse(value)]


_SYMMETRIES = {
    pb.RunSpec.SYMMETRY_UNSPECIFIED: "none",
    pb.RunSpec.SYMMETRY_NONE: "none",
    pb.RunSpec.SYMMETRY_BITANT: "bitant",
}
_SYMMETRIES_BACK = {"none": pb.RunSpec.SYMMETRY_NONE, "bitant": pb.RunSpec.SYMMETRY_BITANT}


def _enum_from_wire(table: dict, value: int, field: str, what: str, expected: str):
    """``table[value]``; INVALID_ARGUMENT naming ``field`` for a value the table lacks."""
    try:
        return table[value]
    except KeyError:
        raise ServiceError.invalid(f"{field}: unknown {what} {value}; expected {expected}") from None


def symmetry_from_wire(value: int, field: str = "spec.symmetry") -> str:
    """"none" or "bitant" from the wire enum (unspecified is none); INVALID_ARGUMENT naming ``field``."""
    return _enum_from_wire(_SYMMETRIES, value, field, "symmetry", "SYMMETRY_NONE or SYMMETRY_BITANT")


_SHIFT_GAUGES = {
    pb.RunSpec.SHIFT_GAUGE_UNSPECIFIED: "unspecified",
    pb.RunSpec.SHIFT_GAUGE_MOVING_PUNCTURE: "moving_puncture",
    pb.RunSpec.SHIFT_GAUGE_OTHER: "other",
}
_SHIFT_GAUGES_BACK = {v: k for k, v in _SHIFT_GAUGES.items()}


def shift_gauge_from_wire(value: int, field: str = "spec.shift_gauge") -> str:
    """"unspecified", "moving_puncture" or "other"; INVALID_ARGUMENT naming ``field`` otherwise."""
    return _enum_from_wire(_SHIFT_GAUGES, value, field, "shift gauge",
                           "SHIFT_GAUGE_MOVING_PUNCTURE, SHIFT_GAUGE_OTHER or unset")


def excised_spheres_from_wire(spheres, field: str = "spec.excised_spheres") -> tuple[ExcisedSphere, ...]:
    """The declared excised spheres; INVALID_ARGUMENT naming the sphere and field at fault."""
    if len(spheres) > MAX_EXCISED_SPHERES:
        raise ServiceError.invalid(f"{field}: at most {MAX_EXCISED_SPHERES} spheres, got {len(spheres)}")
    result = []
    for index, sphere in enumerate(spheres):
        where = f"{field}[{index}]"
        c = sphere.centre_m
        centre = tuple(_finite(v, f"{where}.centre_m") for v in (c.x, c.y, c.z))
        radius = _finite(sphere.radius_m, f"{where}.radius_m")
        if radius <= 0:
            raise ServiceError.invalid(f"{where}.radius_m: expected a radius > 0 in M, got {radius}")
        if sphere.body and not _LABEL.match(sphere.body):
            raise ServiceError.invalid(f"{where}.body: expected empty or 1-32 letters, digits, '-' or '_', "
                                       f"got {sphere.body!r}")
        result.append(ExcisedSphere(centre, radius, sphere.body))
    return tuple(result)


def excised_spheres_to_wire(spheres) -> list[pb.ExcisedSphere]:
    return [pb.ExcisedSphere(centre_m=pb.Vector3(x=s.centre[0], y=s.centre[1], z=s.centre[2]), radius_m=s.radius,
                             body=s.body) for s in spheres]


def _finite(value: float, field: str) -> float:
    if not math.isfinite(value):
        raise ServiceError.invalid(f"{field}: expected a finite number, got {value}")
    return float(value)


def refinement_from_wire(policy: pb.RefinementPolicy, field: str = "spec.refinement") -> RefinementPolicy:
    """The guidance policy of a spec, defaults filled in (0 / unset means the default)."""
    d = DEFAULT_REFINEMENT
    points = _finite(policy.points_across_horizon, f"{field}.points_across_horizon") or d.points_across_horizon
    if points <= 0:
        raise ServiceError.invalid(f"{field}.points_across_horizon: expected > 0 (0 for the default "
                                   f"{d.points_across_horizon:g}), got {points}")
    depth = int(policy.nesting_depth) or d.nesting_depth
    if not 1 <= depth <= MAX_NESTING_DEPTH:
        raise ServiceError.invalid(f"{field}.nesting_depth: expected 1..{MAX_NESTING_DEPTH} (0 for the default "
                                   f"{d.nesting_depth}), got {depth}")
    ratio = _finite(policy.level_ratio, f"{field}.level_ratio") or d.level_ratio
    if ratio <= 1:
        raise ServiceError.invalid(f"{field}.level_ratio: expected > 1 (0 for the default {d.level_ratio:g}), got {ratio}")
    factor = _finite(policy.finest_radius_factor, f"{field}.finest_radius_factor") or d.finest_radius_factor
    if factor < 1:
        raise ServiceError.invalid(f"{field}.finest_radius_factor: expected >= 1 so the region holds the horizon "
                                   f"(0 for the default {d.finest_radius_factor:g}), got {factor}")
    interval = _finite(policy.steering_interval_m, f"{field}.steering_interval_m") or d.steering_interval
    if interval <= 0:
        raise ServiceError.invalid(f"{field}.steering_interval_m: expected a time > 0 in M (0 for the default "
                                   f"{d.steering_interval:g}), got {interval}")
    guard = int(policy.guard_points) if policy.HasField("guard_points") else d.guard_points
    if not 0 <= guard <= 1000:
        raise ServiceError.invalid(f"{field}.guard_points: expected 0..1000 (unset for the default "
                                   f"{d.guard_points}), got {guard}")
    return RefinementPolicy(points_across_horizon=float(points), nesting_depth=depth, level_ratio=float(ratio),
                            finest_radius_factor=float(factor), steering_interval=float(interval),
                            guard_points=guard)


def refinement_to_wire(policy: RefinementPolicy) -> pb.RefinementPolicy:
    return pb.RefinementPolicy(points_across_horizon=policy.points_across_horizon, nesting_depth=policy.nesting_depth,
                               level_ratio=policy.level_ratio, finest_radius_factor=policy.finest_radius_factor,
                               steering_interval_m=policy.steering_interval, guard_points=policy.guard_points)


def _refinement_to_dict(policy: RefinementPolicy) -> dict:
    return {"points_across_horizon": policy.points_across_horizon, "nesting_depth": policy.nesting_depth,
            "level_ratio": policy.level_ratio, "finest_radius_factor": policy.finest_radius_factor,
            "steering_interval": policy.steering_interval, "guard_points": policy.guard_points}


def _refinement_from_dict(data: dict | None) -> RefinementPolicy:
    if not data:  # archives written before the policy existed
        return DEFAULT_REFINEMENT

    def value(name: str, earlier_name: str):
        # Archives written before the policy's fields were renamed hold the earlier names.
        return data[name] if name in data else data[earlier_name]

    return RefinementPolicy(points_across_horizon=float(data["points_across_horizon"]),
                            nesting_depth=int(value("nesting_depth", "levels")),
                            level_ratio=float(data["level_ratio"]),
                            finest_radius_factor=float(data["finest_radius_factor"]),
                            steering_interval=float(value("steering_interval", "regrid_interval")),
                            guard_points=int(value("guard_points", "buffer_points")))


@dataclass(frozen=True)
class BodySpec:
    """An expected body: label, approximate position (units of M) and mass (units of M)."""

    label: str
    position: tuple[float, float, float]
    mass: float


@dataclass(frozen=True)
class RunSettings:
    """The validated spec of a run (every default filled in)."""

    display_name: str
    variable_set: VariableSet
    mass_scale_solar_masses: float
    bodies: tuple[BodySpec, ...]
    lmax: int
    tolerance: float
    max_iterations: int
    queue_depth: int
    backlog_policy: str = "keep_newest"
    #: Highest degree of the common surface of a pair (0: the run's lmax; from_wire fills in
    #: max(DEFAULT_LMAX_COMMON, lmax)).
    lmax_common: int = 0
    #: Highest degree the finder may raise any surface to when it is not resolved (0: no raising,
    #: as archives written before the field; from_wire fills in max(DEFAULT_LMAX_CAP, lmax_common)).
    lmax_cap: int = 0
    #: Policy of the refinement guidance (tracking.guidance.RefinementPolicy).
    refinement: RefinementPolicy = DEFAULT_REFINEMENT
    #: Seconds from the first part of a slice sent in parts until the server processes what arrived.
    part_deadline_s: float = DEFAULT_PART_DEADLINE_S
    #: The run's symmetry: "none", or "bitant" (slices carry z >= 0 only and are mirrored
    #: through z = 0 at ingest).
    symmetry: str = "none"
    #: Regions whose values are not data (numerics.excision.ExcisedSphere), units of M.
    excised_spheres: tuple[ExcisedSphere, ...] = ()
    #: "moving_puncture" (puncture tracks are integrated from the shift), "other" or
    #: "unspecified" (both: the shift is not used for tracking).
    shift_gauge: str = "unspecified"
    #: Forecast when a pair's common horizon forms (server/formation.py); RunSpec.formation_forecast_off.
    formation_forecast: bool = True
    #: Look for the inner common MOTS inside a found common horizon (RunSpec.skip_inner_common).
    inner_common: bool = True

    @property
    def bitant(self) -> bool:
        return self.symmetry == "bitant"

    @property
    def tracks_punctures(self) -> bool:
        """Whether puncture tracks are integrated from the shift (a moving-puncture gauge)."""
        return self.shift_gauge == "moving_puncture"

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(body.label for body in self.bodies)

    @property
    def common_lmax(self) -> int:
        """Degree of the common surface's expansion."""
        return int(self.lmax_common or self.lmax)

    def lmax_cap_for(self, lmax: int) -> int:
        """The finder's l_max cap for a surface of degree ``lmax`` (never below it)."""
        return max(int(lmax), int(self.lmax_cap))

    # -- wire ---------------------------------------------------------------------------------

    @classmethod
    def from_wire(cls, spec: pb.RunSpec, *, default_queue_depth: int = DEFAULT_QUEUE_DEPTH) -> "RunSettings":
        """Validate an OpenRun spec; raises :class:`ServiceError` (INVALID_ARGUMENT) naming the field."""
        variable_set = variable_set_from_wire(spec.variable_set, "spec.variable_set")
        if not spec.bodies:
            raise ServiceError.invalid("spec.bodies: expected at least one expected body, got none")
        if len(spec.bodies) > MAX_BODIES:
            raise ServiceError.invalid(f"spec.bodies: at most {MAX_BODIES} bodies, got {len(spec.bodies)}")
        bodies = []
        seen = set()
        for index, body in enumerate(spec.bodies):
            where = f"spec.bodies[{index}]"
            if not _LABEL.match(body.label):
                raise ServiceError.invalid(
                    f"{where}.label: expected 1-32 letters, digits, '-' or '_', got {body.label!r}"
                )
            if body.label in seen:
                raise ServiceError.invalid(f"{where}.label: {body.label!r} is used by another body")
            seen.add(body.label)
            p = body.approximate_position_m
            position = tuple(_finite(v, f"{where}.approximate_position_m") for v in (p.x, p.y, p.z))
            mass = _finite(body.approximate_mass_m, f"{where}.approximate_mass_m")
            if mass <= 0:
                raise ServiceError.invalid(f"{where}.approximate_mass_m: expected a mass > 0, got {mass}")
            bodies.append(BodySpec(body.label, position, mass))
        finder = spec.finder
        lmax = finder.lmax or DEFAULT_LMAX
        if not 2 <= lmax <= MAX_LMAX:
            raise ServiceError.invalid(f"spec.finder.lmax: expected 2..{MAX_LMAX} (0 for the default {DEFAULT_LMAX}), got {lmax}")
        tolerance = _finite(finder.tolerance_per_m, "spec.finder.tolerance_per_m") or DEFAULT_TOLERANCE
        if tolerance <= 0:
            raise ServiceError.invalid(f"spec.finder.tolerance_per_m: expected > 0 (0 for the default), got {tolerance}")
        lmax_common = finder.lmax_common or max(DEFAULT_LMAX_COMMON, lmax)
        if not 2 <= lmax_common <= MAX_LMAX:
            raise ServiceError.invalid(f"spec.finder.lmax_common: expected 2..{MAX_LMAX} (0 for the default "
                                       f"max({DEFAULT_LMAX_COMMON}, lmax)), got {lmax_common}")
        lmax_cap = finder.lmax_cap or max(DEFAULT_LMAX_CAP, lmax_common)
        if not max(lmax, lmax_common) <= lmax_cap <= MAX_LMAX:
            raise ServiceError.invalid(f"spec.finder.lmax_cap: expected {max(lmax, lmax_common)}..{MAX_LMAX} (at least "
                                       f"lmax and lmax_common; 0 for the default max({DEFAULT_LMAX_CAP}, lmax_common)), "
                                       f"got {lmax_cap}")
        max_iterations = finder.max_iterations or DEFAULT_MAX_ITERATIONS
        if not 1 <= max_iterations <= 1000:
            raise ServiceError.invalid(
                f"spec.finder.max_iterations: expected 1..1000 (0 for the default {DEFAULT_MAX_ITERATIONS}), got {max_iterations}"
            )
        if spec.backlog.policy not in (pb.BacklogPolicy.POLICY_UNSPECIFIED, pb.BacklogPolicy.POLICY_KEEP_NEWEST):
            raise ServiceError.invalid(
                f"spec.backlog.policy: unknown policy {spec.backlog.policy}; expected POLICY_KEEP_NEWEST"
            )
        depth = spec.backlog.queue_depth or default_queue_depth
        if not 1 <= depth <= MAX_QUEUE_DEPTH:
            raise ServiceError.invalid(f"spec.backlog.queue_depth: expected 1..{MAX_QUEUE_DEPTH} (0 for the default), got {depth}")
        part_deadline = _finite(spec.part_deadline_s, "spec.part_deadline_s") or DEFAULT_PART_DEADLINE_S
        if not 0 < part_deadline <= MAX_PART_DEADLINE_S:
            raise ServiceError.invalid(f"spec.part_deadline_s: expected seconds in (0, {MAX_PART_DEADLINE_S:g}] "
                                       f"(0 for the default {DEFAULT_PART_DEADLINE_S:g}), got {part_deadline}")
        scale = _finite(spec.mass_scale_solar_masses, "spec.mass_scale_solar_masses")
        if scale < 0:
            raise ServiceError.invalid(f"spec.mass_scale_solar_masses: expected >= 0, got {scale}")
        return cls(
            display_name=spec.display_name[:200],
            variable_set=variable_set,
            mass_scale_solar_masses=scale,
            bodies=tuple(bodies),
            lmax=int(lmax),
            tolerance=float(tolerance),
            max_iterations=int(max_iterations),
            queue_depth=int(depth),
            lmax_common=int(lmax_common),
            lmax_cap=int(lmax_cap),
            refinement=refinement_from_wire(spec.refinement),
            part_deadline_s=float(part_deadline),
            symmetry=symmetry_from_wire(spec.symmetry),
            excised_spheres=excised_spheres_from_wire(spec.excised_spheres),
            shift_gauge=shift_gauge_from_wire(spec.shift_gauge),
            formation_forecast=not spec.formation_forecast_off,
            inner_common=not spec.skip_inner_common,
        )

    def to_wire(self) -> pb.RunSpec:
        return pb.RunSpec(
            display_name=self.display_name,
            variable_set=variable_set_to_wire(self.variable_set),
            mass_scale_solar_masses=self.mass_scale_solar_masses,
            bodies=[
                pb.ExpectedBody(
                    label=b.label,
                    approximate_position_m=pb.Vector3(x=b.position[0], y=b.position[1], z=b.position[2]),
                    approximate_mass_m=b.mass,
                )
                for b in self.bodies
            ],
            finder=pb.FinderSettings(lmax=self.lmax, tolerance_per_m=self.tolerance, max_iterations=self.max_iterations,
                                     lmax_common=self.common_lmax, lmax_cap=self.lmax_cap),
            backlog=pb.BacklogPolicy(policy=pb.BacklogPolicy.POLICY_KEEP_NEWEST, queue_depth=self.queue_depth),
            refinement=refinement_to_wire(self.refinement),
            part_deadline_s=self.part_deadline_s,
            symmetry=_SYMMETRIES_BACK[self.symmetry],
            excised_spheres=excised_spheres_to_wire(self.excised_spheres),
            shift_gauge=_SHIFT_GAUGES_BACK[self.shift_gauge],
            formation_forecast_off=not self.formation_forecast,
            skip_inner_common=not self.inner_common,
        )

    # -- archive attributes -----------------------------------------------------------------

    def to_dict(self) -> dict:
        """JSON-able form stored as the archive's ``run_spec`` attribute."""
        return {
            "display_name": self.display_name,
            "variable_set": self.variable_set.value,
            "mass_scale_solar_masses": self.mass_scale_solar_masses,
            "bodies": [{"label": b.label, "position": list(b.position), "mass": b.mass} for b in self.bodies],
            "finder": {"lmax": self.lmax, "tolerance": self.tolerance, "max_iterations": self.max_iterations,
                       "lmax_common": self.common_lmax, "lmax_cap": self.lmax_cap},
            "backlog": {"queue_depth": self.queue_depth, "policy": self.backlog_policy},
            "refinement": _refinement_to_dict(self.refinement),
            "part_deadline_s": self.part_deadline_s,
            "symmetry": self.symmetry,
            "excised_spheres": [{"centre": list(s.centre), "radius": s.radius, "body": s.body}
                                for s in self.excised_spheres],
            "shift_gauge": self.shift_gauge,
            "formation_forecast": self.formation_forecast,
            "inner_common": self.inner_common,
        }

    @classmethod
    def from_dict(cls, data: dict) -> "RunSettings":
        return cls(
            display_name=data["display_name"],
            variable_set=VariableSet.parse(data["variable_set"]),
            mass_scale_solar_masses=float(data["mass_scale_solar_masses"]),
            bodies=tuple(BodySpec(b["label"], tuple(float(v) for v in b["position"]), float(b["mass"])) for b in data["bodies"]),
            lmax=int(data["finder"]["lmax"]),
            tolerance=float(data["finder"]["tolerance"]),
            max_iterations=int(data["finder"]["max_iterations"]),
            queue_depth=int(data["backlog"]["queue_depth"]),
            # Archives written before lmax_common existed kept their common surface at lmax.
            lmax_common=int(data["finder"].get("lmax_common", 0)),
            # Archives written before lmax_cap existed: no raising (as their finds ran).
            lmax_cap=int(data["finder"].get("lmax_cap", 0)),
            backlog_policy=data["backlog"].get("policy", "keep_newest"),
            refinement=_refinement_from_dict(data.get("refinement")),
            part_deadline_s=float(data.get("part_deadline_s", DEFAULT_PART_DEADLINE_S)),
            # Archives written before the symmetry choice hold the bool reflection_z.
            symmetry=data.get("symmetry") or ("bitant" if data.get("reflection_z") else "none"),
            excised_spheres=tuple(ExcisedSphere(tuple(s["centre"]), float(s["radius"]), s.get("body", ""))
                                  for s in data.get("excised_spheres", ())),
            # Archives written before the gauge was declared integrated tracks from any shift.
            shift_gauge=data.get("shift_gauge", "moving_puncture"),
            formation_forecast=bool(data.get("formation_forecast", True)),
            inner_common=bool(data.get("inner_common", True)),
        )
