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
docs/references.md item 7); the track ends well below that, so a common horizon must appear on
the way even though unequal masses shift the threshold somewhat.

The grid mimics the mesh refinement of a run: an outer box at twice the coarse spacing reaching
3 M from the origin (a run's grid extends much further; this one is just large enough that a
crop to the server's data windows has something to leave out), one coarse box around the
origin and, at half its spacing, one fine box around each puncture, snapped to the fine lattice
as a mesh-refinement code would place it. The lattice is offset by a quarter of a coarse cell in
every direction, so the orbital plane z = 0 lies half-way between fine nodes and no node ever
sits on a puncture. Fields are sent in the conformal ``W`` variable set (W = psi^-2 stays finite
at a puncture where the physical metric does not).

Brill-Lindquist data fix no shift. So that the server can integrate puncture tracks
(d x^i / dt = -beta^i at a puncture), the demo also sends an invented shift: the blend
beta = -(r_2^2 v_1 + r_1^2 v_2) / (r_1^2 + r_2^2) of the punctures' track velocities v_i, with
r_i the coordinate distance to puncture i. It is smooth, and equals -v_i exactly at puncture i,
so the integrated puncture moves along the invented track; away from the punctures it means
nothing.

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
    "blended_shift_fields",
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

    def velocities(self, time: float) -> np.ndarray:
        """(2, 3) coordinate velocities d x_i / dt of the punctures (dimensionless), the exact
        derivative of :meth:`positions`."""
        m1, m2 = self.masses
        t = float(time)
        d = float(self.separation(t))
        phi = float(self.phase(t))
        shrinking = 0.0 <= t < self.duration
        d_dot = -self.shrink_speed if shrinking else 0.0
        omega = float(np.sqrt(self.total_mass / d ** 3))
        direction = np.array([np.cos(phi), np.sin(phi), 0.0])
        normal = np.array([-np.sin(phi), np.cos(phi), 0.0])
        relative = d_dot * direction + d * omega * normal
        return np.stack([(m2 / self.total_mass) * relative, -(m1 / self.total_mass) * relative])


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
    """Refinement levels: an optional outer box, a coarse box about the origin, a fine box around
    each puncture.

    Attributes:
        coarse_nodes: nodes per axis of the coarse box.
        coarse_half_width: the coarse box spans about [-w, w] on each axis, units of M.
        fine_nodes: nodes per axis of each fine box (spacing half the coarse one).
        outer_half_width: 0 for no outer level; else an outer box at twice the coarse spacing
            spanning about [-w, w] on each axis (units of M, more than ``coarse_half_width``),
            on the coarse lattice, as level 0 (the coarse and fine boxes then are levels 1 and 2).
    """

    coarse_nodes: int = 48
    coarse_half_width: float = 1.5
    fine_nodes: int = 32
    outer_half_width: float = 0.0

    def __post_init__(self) -> None:
        if self.coarse_nodes < 8 or self.fine_nodes < 8:
            raise ValueError(
                f"coarse_nodes, fine_nodes: expected at least 8 nodes per axis, got "
                f"{self.coarse_nodes} and {self.fine_nodes}"
            )
        if not self.coarse_half_width > 0:
            raise ValueError(f"coarse_half_width: expected a positive length, got {self.coarse_half_width!r}")
        if not (self.outer_half_width == 0 or self.outer_half_width > self.coarse_half_width):
            raise ValueError(
                f"outer_half_width: expected 0 (no outer level) or a length above coarse_half_width "
                f"{self.coarse_half_width!r}, got {self.outer_half_width!r}"
            )

    @property
    def has_outer(self) -> bool:
        return self.outer_half_width > 0

    @property
    def coarse_level(self) -> int:
        return 1 if self.has_outer else 0

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
        return BoxSpec(origin=(o, o, o), spacing=self.coarse_spacing, shape=(n, n, n), level=self.coarse_level)

    def outer_box(self) -> BoxSpec | None:
        """The outer level (None without one): spacing 2 x coarse, its nodes on coarse nodes."""
        if not self.has_outer:
            return None
        h = 2.0 * self.coarse_spacing
        steps = int(np.ceil((self.outer_half_width + self.coarse_origin) / h - 1e-9))
        o = self.coarse_origin - steps * h
        n = int(np.floor((self.outer_half_width - o) / h + 1e-9)) + 1
        return BoxSpec(origin=(o, o, o), spacing=h, shape=(n, n, n), level=0)

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
        return BoxSpec(origin=tuple(float(v) for v in snapped), spacing=hf, shape=(n, n, n),
                       level=self.coarse_level + 1)

    def boxes(self, punctures) -> list[BoxSpec]:
        """Outer box (if any), coarse box, then one fine box per puncture (``punctures``: (n, 3))."""
        outer = [] if self.outer_box() is None else [self.outer_box()]
        return outer + [self.coarse_box()] + [self.fine_box(p) for p in np.asarray(punctures, dtype=float)]


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


def blended_shift_fields(box: BoxSpec, positions, velocities) -> dict[str, np.ndarray]:
    """The demo's invented shift on a box: ``shift_x/y/z`` arrays indexed [i, j, k].

    beta = -sum_i w_i v_i with weights w_i = prod_{j != i} r_j^2 / sum_k prod_{j != k} r_j^2
    (r_j: coordinate distance to puncture j), i.e. for two punctures
    beta = -(r_2^2 v_1 + r_1^2 v_2) / (r_1^2 + r_2^2). A ratio of polynomials in x with a
    non-vanishing denominator, so smooth; beta = -v_i at puncture i exactly (d x / dt = -beta
    moves the puncture with the track). ``positions``, ``velocities``: (n, 3), M and
    dimensionless.
    """
    positions = np.asarray(positions, dtype=float)
    velocities = np.asarray(velocities, dtype=float)
    if positions.ndim != 2 or positions.shape[1] != 3 or velocities.shape != positions.shape:
        raise ValueError(f"positions, velocities: expected two (n, 3) arrays, got {positions.shape} and {velocities.shape}")
    x, y, z = np.meshgrid(*box.node_axes(), indexing="ij")
    r2 = [(x - p[0]) ** 2 + (y - p[1]) ** 2 + (z - p[2]) ** 2 for p in positions]
    weights = []
    for i in range(len(positions)):
        w = np.ones(box.shape)
        for j, r in enumerate(r2):
            if j != i:
                w = w * r
        weights.append(w)
    total = sum(weights)
    return {name: -sum(w * v[axis] for w, v in zip(weights, velocities)) / total
            for axis, name in enumerate(("shift_x", "shift_y", "shift_z"))}


@dataclass(frozen=True)
class DemoScenario:
    """The whole invented run: track, grids and output cadence.

    Attributes:
        track: puncture positions over time.
        layout: the refinement levels (by default with an outer level to 3 M).
        slice_interval: coordinate time between slices sent, units of M.
        iterations_per_slice: evolution iterations between slices (iteration numbers only).
        slices_after_common: slices still sent after the server first reports a common horizon.
    """

    track: InspiralTrack = InspiralTrack()
    layout: GridLayout = GridLayout(outer_half_width=3.0)
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
