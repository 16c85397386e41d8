"""What a run is opened with: its spec and options (frozen dataclasses validated on creation,
with their wire forms). Lengths and masses in units of M."""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import Sequence

from ._excision import ExcisedSphere
from ._fields import VARIABLE_SET_WIRE, check_variable_set, variable_set_from_wire
from ._wire import horizons_pb2 as pb
from ._wire_values import triple

__all__ = ["Body", "FinderOptions", "BacklogOptions", "RefinementOptions", "RunSpec"]

_LABEL = re.compile(r"^[A-Za-z0-9_-]{1,32}$")


@dataclass(frozen=True)
class Body:
    """A body expected to hold a horizon: label, approximate position (3,) and mass, units of M."""

    label: str
    position: tuple[float, float, float]
    mass: float

    def __post_init__(self) -> None:
        if not isinstance(self.label, str) or not _LABEL.match(self.label):
            raise ValueError(f"label: expected 1-32 letters, digits, '-' or '_', got {self.label!r}")
        pos = tuple(float(v) for v in self.position)
        if len(pos) != 3 or not all(math.isfinite(v) for v in pos):
            raise ValueError(f"position: expected three finite numbers, got {self.position!r}")
        if not (math.isfinite(self.mass) and self.mass > 0):
            raise ValueError(f"mass: expected a finite mass > 0, got {self.mass!r}")
        object.__setattr__(self, "position", pos)
        object.__setattr__(self, "mass", float(self.mass))


@dataclass(frozen=True)
class FinderOptions:
    """Finder settings: highest harmonic degree, tolerance on max |Theta| (1/M), iteration cap,
    and the degree of a pair's common surface (0: the server's default max(16, lmax); a freshly
    formed common horizon needs more than the individual ones)."""

    lmax: int = 8
    tolerance: float = 1e-8
    max_iterations: int = 40
    lmax_common: int = 0


@dataclass(frozen=True)
class BacklogOptions:
    """Backlog of the run: queue depth on the server (and in the shim); policy keep-newest."""

    queue_depth: int = 4
    policy: str = "keep_newest"

    def __post_init__(self) -> None:
        if self.policy != "keep_newest":
            raise ValueError(f"policy: expected 'keep_newest', got {self.policy!r}")
        if not 1 <= int(self.queue_depth) <= 1024:
            raise ValueError(f"queue_depth: expected 1..1024, got {self.queue_depth!r}")


@dataclass(frozen=True)
class RefinementOptions:
    """Policy of the server's refinement guidance (defaults from common practice).

    Attributes:
        points_across_horizon: grid points across a horizon's smallest coordinate diameter on
            its finest level (20-40 is usual).
        nesting_depth: depth of the nest of refinement levels around the bodies.
        level_ratio: spacing and radius ratio between neighbouring levels.
        finest_radius_factor: finest radius in horizon radii, before the margins (1.2-2 usual).
        steering_interval: coordinate time between the evolution's steering steps (where it
            moves its refined regions), M.
        guard_points: guard width around the finest region, in finest grid points.
    """

    points_across_horizon: float = 30.0
    nesting_depth: int = 6
    level_ratio: float = 2.0
    finest_radius_factor: float = 1.5
    steering_interval: float = 4.0
    guard_points: int = 4

    def __post_init__(self) -> None:
        checks = (("points_across_horizon", self.points_across_horizon > 0, "> 0"),
                  ("nesting_depth", 1 <= int(self.nesting_depth) <= 16, "1..16"),
                  ("level_ratio", self.level_ratio > 1, "> 1"),
                  ("finest_radius_factor", self.finest_radius_factor >= 1, ">= 1"),
                  ("steering_interval", self.steering_interval > 0, "> 0 (a time in M)"),
                  ("guard_points", int(self.guard_points) >= 0, ">= 0"))
        for name, ok, expected in checks:
            value = getattr(self, name)
            if not ok or not math.isfinite(float(value)):
                raise ValueError(f"refinement.{name}: expected {expected}, got {value!r}")

    def to_wire(self) -> pb.RefinementPolicy:
        return pb.RefinementPolicy(points_across_horizon=float(self.points_across_horizon),
                                   nesting_depth=int(self.nesting_depth), level_ratio=float(self.level_ratio),
                                   finest_radius_factor=float(self.finest_radius_factor),
                                   steering_interval_m=float(self.steering_interval),
                                   guard_points=int(self.guard_points))

    @classmethod
    def from_wire(cls, p: pb.RefinementPolicy) -> "RefinementOptions":
        d = cls()
        return cls(points_across_horizon=p.points_across_horizon or d.points_across_horizon,
                   nesting_depth=p.nesting_depth or d.nesting_depth, level_ratio=p.level_ratio or d.level_ratio,
                   finest_radius_factor=p.finest_radius_factor or d.finest_radius_factor,
                   steering_interval=p.steering_interval_m or d.steering_interval,
                   guard_points=p.guard_points if p.HasField("guard_points") else d.guard_points)


_SYMMETRY_WIRE = {"none": pb.RunSpec.SYMMETRY_NONE, "bitant": pb.RunSpec.SYMMETRY_BITANT}
_SYMMETRY_NAMES = {v: k for k, v in _SYMMETRY_WIRE.items()}
_SHIFT_GAUGE_WIRE = {None: pb.RunSpec.SHIFT_GAUGE_UNSPECIFIED, "moving_puncture": pb.RunSpec.SHIFT_GAUGE_MOVING_PUNCTURE,
                     "other": pb.RunSpec.SHIFT_GAUGE_OTHER}
_SHIFT_GAUGE_NAMES = {v: k for k, v in _SHIFT_GAUGE_WIRE.items()}


@dataclass(frozen=True)
class RunSpec:
    """What the server needs to know about a run.

    Attributes:
        variable_set: "adm", "conformal_chi", "conformal_w" or "conformal_phi".
        bodies: expected bodies (at least one).
        name: free text shown by listings and watchers.
        mass_scale_solar_masses: what M is physically (0: not stated).
        finder: :class:`FinderOptions`.
        backlog: :class:`BacklogOptions`.
        refinement: :class:`RefinementOptions` of the guidance.
        part_deadline_s: for slices sent in parts (one per MPI rank), seconds from the first
            part's arrival until the server processes what arrived (0: the server's default).
        symmetry: "none" (the default), or "bitant": the run has mirror symmetry through z = 0
            and sends z >= 0 only (a node layer on z = 0); the server fills z < 0 with the right
            parity per component.
        excised_spheres: :class:`ExcisedSphere` s the evolution cuts out (values there are not
            data; pass the same to :func:`build_slice` so it accepts NaN there).
        shift_gauge: "moving_puncture" (puncture tracks are integrated from the shift the slices
            carry), "other", or None (not declared); only "moving_puncture" uses the shift.
        formation_forecast: for a pair, forecast when the common horizon forms
            (:class:`FormationForecastEvent`; default True; False turns the searches off).
    """

    variable_set: str
    bodies: Sequence[Body]
    name: str = ""
    mass_scale_solar_masses: float = 0.0
    finder: FinderOptions = field(default_factory=FinderOptions)
    backlog: BacklogOptions = field(default_factory=BacklogOptions)
    refinement: RefinementOptions = field(default_factory=RefinementOptions)
    part_deadline_s: float = 0.0
    symmetry: str = "none"
    excised_spheres: Sequence[ExcisedSphere] = ()
    shift_gauge: str | None = None
    formation_forecast: bool = True

    def __post_init__(self) -> None:
        check_variable_set(self.variable_set)
        if not (math.isfinite(self.part_deadline_s) and self.part_deadline_s >= 0):
            raise ValueError(f"part_deadline_s: expected seconds > 0 (0 for the server's default), "
                             f"got {self.part_deadline_s!r}")
        spheres = tuple(self.excised_spheres)
        if not all(isinstance(sphere, ExcisedSphere) for sphere in spheres):
            raise ValueError(f"excised_spheres: expected ExcisedSphere values, got {list(self.excised_spheres)!r}")
        object.__setattr__(self, "excised_spheres", spheres)
        if self.shift_gauge not in _SHIFT_GAUGE_WIRE:
            raise ValueError(f"shift_gauge: expected 'moving_puncture', 'other' or None, got {self.shift_gauge!r}")
        if self.symmetry not in _SYMMETRY_WIRE:
            raise ValueError(f"symmetry: expected one of {sorted(_SYMMETRY_WIRE)}, got {self.symmetry!r}")
        bodies = tuple(self.bodies)
        if not bodies:
            raise ValueError("bodies: expected at least one Body")
        labels = [b.label for b in bodies]
        if len(set(labels)) != len(labels):
            raise ValueError(f"bodies: labels must be unique, got {labels}")
        object.__setattr__(self, "bodies", bodies)

    def to_wire(self) -> pb.RunSpec:
        return pb.RunSpec(
            display_name=self.name,
            variable_set=VARIABLE_SET_WIRE[self.variable_set],
            mass_scale_solar_masses=self.mass_scale_solar_masses,
            bodies=[
                pb.ExpectedBody(label=b.label, approximate_mass_m=b.mass,
                                approximate_position_m=pb.Vector3(x=b.position[0], y=b.position[1], z=b.position[2]))
                for b in self.bodies
            ],
            finder=pb.FinderSettings(lmax=self.finder.lmax, tolerance_per_m=self.finder.tolerance,
                                     max_iterations=self.finder.max_iterations, lmax_common=self.finder.lmax_common),
            backlog=pb.BacklogPolicy(policy=pb.BacklogPolicy.POLICY_KEEP_NEWEST, queue_depth=self.backlog.queue_depth),
            refinement=self.refinement.to_wire(),
            part_deadline_s=float(self.part_deadline_s),
            symmetry=_SYMMETRY_WIRE[self.symmetry],
            excised_spheres=[sphere.to_wire() for sphere in self.excised_spheres],
            shift_gauge=_SHIFT_GAUGE_WIRE[self.shift_gauge],
            formation_forecast_off=not self.formation_forecast,
        )

    @classmethod
    def from_wire(cls, spec: pb.RunSpec) -> "RunSpec":
        return cls(
            variable_set=variable_set_from_wire(spec.variable_set, "spec.variable_set"),
            bodies=tuple(Body(b.label, tuple(triple(b.approximate_position_m)), b.approximate_mass_m) for b in spec.bodies),
            name=spec.display_name,
            mass_scale_solar_masses=spec.mass_scale_solar_masses,
            finder=FinderOptions(lmax=spec.finder.lmax, tolerance=spec.finder.tolerance_per_m,
                                 max_iterations=spec.finder.max_iterations, lmax_common=spec.finder.lmax_common),
            backlog=BacklogOptions(queue_depth=spec.backlog.queue_depth or 4),
            refinement=RefinementOptions.from_wire(spec.refinement),
            part_deadline_s=spec.part_deadline_s,
            symmetry=_SYMMETRY_NAMES.get(spec.symmetry, "none"),
            excised_spheres=tuple(ExcisedSphere.from_wire(sphere) for sphere in spec.excised_spheres),
            shift_gauge=_SHIFT_GAUGE_NAMES.get(spec.shift_gauge),
        )
