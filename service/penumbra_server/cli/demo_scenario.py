"""The demo's invented binary: Brill-Lindquist snapshots along a shrinking quasi-circular track.

This is *invented data*, not an evolution. Each slice is an exact time-symmetric
Brill-Lindquist slice (K_ij = 0, gamma_ij = psi^4 delta_ij, psi = 1 + sum_i m_i / (2 |x - x_i|);
Brill & Lindquist, Phys. Rev. 131, 471 (1963)) whose two punctures sit on a track we made up:

* bare masses ``m1 = 0.6`` and ``m2 = 0.4`` (total bare mass M = 1, the unit of length and time);
* the coordinate separation shrinks linearly in time from 1.4 M to 0.45 M over 4 M;
* the orbital phase advances with the Kepler frequency omega = sqrt(M / d^3) of the current
  separation d (a leading-order choice for flavour, common practice for synthetic tracks);
* the centre of mass stays at the origin, the orbit lies in the plane z = 0.

For two equal bare masses a common apparent horizon exists below a coordinate separation of
about 0.766 M (Brill & Lindquist 1963; Cadez 1974; Bishop 1982; values from memory, see
/work/shared/references.md item 7); the track ends well below that, so a common horizon must
appear on the way even though unequal masses shift the threshold somewhat.

The grid mimics two refinement levels that follow the holes: one coarse box around the origin
and, at half its spacing, one fine box around each puncture, snapped to the fine lattice as a
mesh-refinement code would place it. The lattice is offset by a quarter of a coarse cell in
every direction, so the orbital plane z = 0 lies half-way between fine nodes and no node ever
sits on a puncture. Fields are sent in the conformal ``W`` variable set (W = psi^-2 stays finite
at a puncture where the physical metric does not).

Everything here is a pure function of its arguments; :mod:`penumbra_server.cli.demo_evolution`
turns it into a stream of slices sent through the shim.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "InspiralTrack",
    "GridLayout",
    "BoxSpec",
    "DemoScenario",
    "brill_lindquist_w_fields",
]


@dataclass(frozen=True)
class InspiralTrack:
    """Puncture positions of the invented binary as functions of coordinate time.

    Attributes:
        masses: bare masses (m1, m2), units of M.
        initial_separation: coordinate separation at t = 0, units of M.
        final_separation: coordinate separation at t = duration, units of M.
        duration: coordinate time over which the separation shrinks, units of M.
        initial_phase: orbital phase at t = 0, radians.
    """

    masses: tuple[float, float] = (0.6, 0.4)
    initial_separation: float = 1.4
    final_separation: float = 0.45
    duration: float = 4.0
    initial_phase: float = 0.0

    def __post_init__(self) -> None:
        if len(self.masses) != 2 or min(self.masses) <= 0:
            raise ValueError(f"masses: expected two positive bare masses, got {self.masses!r}")
        if not (self.initial_separation > self.final_separation > 0):
            raise ValueError(
                "initial_separation, final_separation: expected initial > final > 0, got "
                f"{self.initial_separation!r} and {self.final_separation!r}"
            )
        if not self.duration > 0:
            raise ValueError(f"duration: expected a positive time in M, got {self.duration!r}")

    @property
    def total_mass(self) -> float:
        return float(sum(self.masses))

    @property
    def shrink_speed(self) -> float:
        """-d(separation)/dt, dimensionless."""
        return (self.initial_separation - self.final_separation) / self.duration

    def separation(self, time) -> np.ndarray:
        """Coordinate separation d(t), units of M (held at its final value after ``duration``)."""
        t = np.clip(np.asarray(time, dtype=float), 0.0, self.duration)
        return self.initial_separation - self.shrink_speed * t

    def phase(self, time) -> np.ndarray:
        """Orbital phase phi(t) = phi0 + integral of sqrt(M / d^3) dt, radians (closed form for linear d)."""
        t = np.asarray(time, dtype=float)
        tc = np.clip(t, 0.0, self.duration)
        d = self.separation(tc)
        root_m = np.sqrt(self.total_mass)
        phi = self.initial_phase + 2.0 * root_m / self.shrink_speed * (d ** -0.5 - self.initial_separation ** -0.5)
        # Past the end of the shrink the binary keeps orbiting at the final separation.
        extra = np.clip(t - self.duration, 0.0, None) * root_m * self.final_separation ** -1.5
        return phi + extra

    def positions(self, time: float) -> np.ndarray:
        """(2, 3) puncture positions at coordinate time ``time``, centre of mass at the origin."""
        m1, m2 = self.masses
        d = float(self.separation(time))
        phi = float(self.phase(time))
        direction = np.array([np.cos(phi), np.sin(phi), 0.0])
        return np.stack([(m2 / self.total_mass) * d * direction, -(m1 / self.total_mass) * d * direction])


@dataclass(frozen=True)
class BoxSpec:
    """One vertex-centred box: node [0,0,0] at ``origin``, ``shape`` nodes at ``spacing``."""

    origin: tuple[float, float, float]
    spacing: float
    shape: tuple[int, int, int]
    level: int

    def node_axes(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        return tuple(self.origin[a] + self.spacing * np.arange(self.shape[a]) for a in range(3))

    @property
    def upper(self) -> np.ndarray:
        return np.asarray(self.origin) + self.spacing * (np.asarray(self.shape) - 1)


@dataclass(frozen=True)
class GridLayout:
    """Two refinement levels: a coarse box about the origin, a fine box around each puncture.

    Attributes:
        coarse_nodes: nodes per axis of the coarse box.
        coarse_half_width: the coarse box spans about [-w, w] on each axis, units of M.
        fine_nodes: nodes per axis of each fine box (spacing half the coarse one).
    """

    coarse_nodes: int = 48
    coarse_half_width: float = 1.5
    fine_nodes: int = 32

    def __post_init__(self) -> None:
        if self.coarse_nodes < 8 or self.fine_nodes < 8:
            raise ValueError(
                f"coarse_nodes, fine_nodes: expected at least 8 nodes per axis, got "
                f"{self.coarse_nodes} and {self.fine_nodes}"
            )
        if not self.coarse_half_width > 0:
            raise ValueError(f"coarse_half_width: expected a positive length, got {self.coarse_half_width!r}")

    @property
    def coarse_spacing(self) -> float:
        return 2.0 * self.coarse_half_width / (self.coarse_nodes - 1)

    @property
    def fine_spacing(self) -> float:
        return 0.5 * self.coarse_spacing

    @property
    def coarse_origin(self) -> float:
        # A quarter coarse cell off the symmetric placement: coarse nodes at (k + 1/4) h, fine
        # nodes at (k/2 + 1/4) h, so the plane z = 0 (and the origin) is never a node.
        return -self.coarse_half_width + 0.25 * self.coarse_spacing

    def coarse_box(self) -> BoxSpec:
        o = self.coarse_origin
        n = self.coarse_nodes
        return BoxSpec(origin=(o, o, o), spacing=self.coarse_spacing, shape=(n, n, n), level=0)

    def fine_box(self, centre) -> BoxSpec:
        """The fine box centred as nearly as the fine lattice allows on ``centre``, kept inside the coarse box."""
        centre = np.asarray(centre, dtype=float)
        hf = self.fine_spacing
        n = self.fine_nodes
        lo_c = self.coarse_origin
        hi_c = lo_c + self.coarse_spacing * (self.coarse_nodes - 1)
        wanted = centre - 0.5 * (n - 1) * hf
        snapped = lo_c + np.round((wanted - lo_c) / hf) * hf
        snapped = np.clip(snapped, lo_c, hi_c - (n - 1) * hf)
        return BoxSpec(origin=tuple(float(v) for v in snapped), spacing=hf, shape=(n, n, n), level=1)

    def boxes(self, punctures) -> list[BoxSpec]:
        """Coarse box first, then one fine box per puncture (``punctures``: (n, 3))."""
        return [self.coarse_box()] + [self.fine_box(p) for p in np.asarray(punctures, dtype=float)]


def brill_lindquist_w_fields(box: BoxSpec, masses, positions) -> dict[str, np.ndarray]:
    """Conformal-W fields of Brill-Lindquist data on a box, arrays indexed [i, j, k].

    W = psi^-2 with psi = 1 + sum_i m_i / (2 |x - x_i|); gamma_tilde_ij = delta_ij; A_tilde_ij = 0;
    trace_K = 0 (time symmetric). Computed directly so it is finite even arbitrarily close to a
    puncture (W -> 0 there). Used to cross-check the reference spacetime module in tests.
    """
    x, y, z = np.meshgrid(*box.node_axes(), indexing="ij")
    psi = np.ones(box.shape)
    for m, p in zip(np.asarray(masses, dtype=float), np.asarray(positions, dtype=float)):
        psi += m / (2.0 * np.sqrt((x - p[0]) ** 2 + (y - p[1]) ** 2 + (z - p[2]) ** 2))
    zeros = np.zeros(box.shape)
    ones = np.ones(box.shape)
    fields = {"W": psi ** -2}
    for suffix in ("xx", "xy", "xz", "yy", "yz", "zz"):
        fields[f"gamma_tilde_{suffix}"] = ones.copy() if suffix in ("xx", "yy", "zz") else zeros.copy()
        fields[f"A_tilde_{suffix}"] = zeros.copy()
    fields["trace_K"] = zeros.copy()
    return fields


@dataclass(frozen=True)
class DemoScenario:
    """The whole invented run: track, grids and output cadence.

    Attributes:
        track: puncture positions over time.
        layout: the two refinement levels.
        slice_interval: coordinate time between slices sent, units of M.
        iterations_per_slice: evolution iterations between slices (iteration numbers only).
        slices_after_common: slices still sent after the server first reports a common horizon.
    """

    track: InspiralTrack = InspiralTrack()
    layout: GridLayout = GridLayout()
    slice_interval: float = 0.2
    iterations_per_slice: int = 16
    slices_after_common: int = 3

    def __post_init__(self) -> None:
        if not self.slice_interval > 0:
            raise ValueError(f"slice_interval: expected a positive time in M, got {self.slice_interval!r}")

    @property
    def slice_count(self) -> int:
        """Slices along the whole track, t = 0 .. duration inclusive."""
        return int(np.floor(self.track.duration / self.slice_interval + 1e-9)) + 1

    def time_of(self, index: int) -> float:
        return index * self.slice_interval

    def iteration_of(self, index: int) -> int:
        return index * self.iterations_per_slice

    def boxes_at(self, index: int) -> list[BoxSpec]:
        return self.layout.boxes(self.track.positions(self.time_of(index)))

    def nearest_node_distance(self, index: int) -> float:
        """Smallest distance from any puncture to any node of any box at slice ``index``, units of M."""
        best = np.inf
        for box in self.boxes_at(index):
            for p in self.track.positions(self.time_of(index)):
                per_axis = []
                for a, axis in enumerate(box.node_axes()):
                    per_axis.append(np.min(np.abs(axis - p[a])))
                best = min(best, float(np.sqrt(np.sum(np.square(per_axis)))))
        return best

    def bodies(self) -> list[dict]:
        """Bodies as a run spec names them: label, approximate position at t = 0, approximate mass."""
        positions = self.track.positions(0.0)
        return [
            {"label": label, "position": tuple(float(v) for v in pos), "mass": float(m)}
            for label, pos, m in zip(("heavy", "light"), positions, self.track.masses)
        ]
