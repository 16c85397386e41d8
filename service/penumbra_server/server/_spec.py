"""A run's spec on the server side: validated once from the wire, with defaults filled in.

Conversion to and from the wire message and from the archive's ``run_spec`` attribute (a
restarted server re-opens runs from it).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from penumbra_shim._wire import horizons_pb2 as pb

from ..numerics.slices import VariableSet
from .errors import ServiceError

__all__ = [
    "BodySpec",
    "RunSettings",
    "DEFAULT_LMAX",
    "DEFAULT_TOLERANCE",
    "DEFAULT_MAX_ITERATIONS",
    "DEFAULT_QUEUE_DEPTH",
    "variable_set_from_wire",
    "variable_set_to_wire",
]

DEFAULT_LMAX = 8
DEFAULT_TOLERANCE = 1e-8  # 1/M; common practice is 1e-8 to 1e-10 (references.md)
DEFAULT_MAX_ITERATIONS = 40
DEFAULT_QUEUE_DEPTH = 4
MAX_LMAX = 32
MAX_BODIES = 16
MAX_QUEUE_DEPTH = 1024

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


def _finite(value: float, field: str) -> float:
    if not math.isfinite(value):
        raise ServiceError.invalid(f"{field}: expected a finite number, got {value}")
    return float(value)


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

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(body.label for body in self.bodies)

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
            finder=pb.FinderSettings(lmax=self.lmax, tolerance_per_m=self.tolerance, max_iterations=self.max_iterations),
            backlog=pb.BacklogPolicy(policy=pb.BacklogPolicy.POLICY_KEEP_NEWEST, queue_depth=self.queue_depth),
        )

    # -- archive attributes -----------------------------------------------------------------

    def to_dict(self) -> dict:
        """JSON-able form stored as the archive's ``run_spec`` attribute."""
        return {
            "display_name": self.display_name,
            "variable_set": self.variable_set.value,
            "mass_scale_solar_masses": self.mass_scale_solar_masses,
            "bodies": [{"label": b.label, "position": list(b.position), "mass": b.mass} for b in self.bodies],
            "finder": {"lmax": self.lmax, "tolerance": self.tolerance, "max_iterations": self.max_iterations},
            "backlog": {"queue_depth": self.queue_depth, "policy": self.backlog_policy},
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
            backlog_policy=data["backlog"].get("policy", "keep_newest"),
        )
