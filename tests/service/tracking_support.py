"""Helpers of the tracking and guidance tests: Brill-Lindquist pairs on shrinking tracks as shim
slices, and waiting for a slice's guidance to reach the shim's cache."""

from __future__ import annotations

import time

import numpy as np

import penumbra_shim as ps
from penumbra_server.cli.demo_scenario import BoxSpec, DemoScenario, GridLayout, InspiralTrack, brill_lindquist_w_fields


def cube(centre, half_width: float, spacing: float, *, offset=(0.27, 0.31, 0.23), level: int = 0) -> BoxSpec:
    """A vertex-centred cube about ``centre`` whose nodes are shifted by ``offset`` spacings (so
    no node sits on a puncture or a symmetry plane)."""
    n = int(round(2 * half_width / spacing)) + 1
    origin = tuple(float(c - half_width + o * spacing) for c, o in zip(centre, offset))
    return BoxSpec(origin=origin, spacing=spacing, shape=(n, n, n), level=level)


def bl_patches(boxes, masses, positions) -> list[ps.PatchData]:
    """Conformal-W Brill-Lindquist fields (demo_scenario.brill_lindquist_w_fields) on ``boxes``."""
    return [ps.PatchData(origin=b.origin, spacing=(b.spacing,) * 3, level=b.level,
                         fields=brill_lindquist_w_fields(b, masses, positions)) for b in boxes]


def demo_like_scenario() -> DemoScenario:
    """The demo's unequal pair (bare masses 0.6 + 0.4) on a shrinking circular track, from
    d = 1.4 M (as the demo) to 0.8 M over 2 M, two refinement levels following the holes, one
    slice per 0.1 M.

    The demo itself sends a slice per 0.2 M; there the light hole moves up to 60 % of its
    horizon radius between slices, more than a seed from the previous slice reaches before a
    forecast exists; at 0.1 M it moves about a third.
    """
    return DemoScenario(track=InspiralTrack(masses=(0.6, 0.4), initial_separation=1.4, final_separation=0.8,
                                            duration=2.0),
                        layout=GridLayout(coarse_nodes=40, coarse_half_width=1.5, fine_nodes=24), slice_interval=0.1)


def scenario_boxes(scenario: DemoScenario, index: int) -> list[BoxSpec]:
    """The demo's two levels moved up one, under an outer level 0 of twice the coarse spacing
    reaching 3 M from the origin (a run's grid extends far beyond the holes; the demo's does not,
    which would leave nothing for a crop to save)."""
    inner = scenario.boxes_at(index)
    h = 2.0 * scenario.layout.coarse_spacing
    outer = cube((0.0, 0.0, 0.0), 3.0, h, offset=(0.125, 0.125, 0.125))
    return [outer] + [BoxSpec(origin=b.origin, spacing=b.spacing, shape=b.shape, level=b.level + 1) for b in inner]


def scenario_slice(scenario: DemoScenario, index: int) -> ps.OutgoingSlice:
    positions = scenario.track.positions(scenario.time_of(index))
    return ps.build_slice(time=scenario.time_of(index), iteration=scenario.iteration_of(index),
                          variable_set="conformal_w",
                          patches=bl_patches(scenario_boxes(scenario, index), scenario.track.masses, positions))


def scenario_bodies(scenario: DemoScenario) -> tuple[ps.Body, ...]:
    return tuple(ps.Body(b["label"], b["position"], b["mass"]) for b in scenario.bodies())


def wait_for_windows(run: ps.RunHandle, iteration: int, timeout_s: float = 60.0) -> ps.DataWindows:
    """Block until the shim's cache holds the data windows made from slice ``iteration``."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        windows = run.latest_windows()
        if windows is not None and windows.iteration >= iteration:
            return windows
        time.sleep(0.02)
    raise TimeoutError(f"no data windows for iteration {iteration} within {timeout_s} s")


def surface_points(report: ps.SurfaceReport, samples: int = 24) -> np.ndarray:
    """(n, 3) points of a reported surface on a theta-phi lattice (from its coefficients)."""
    from penumbra_server.numerics.surfaces import Surface

    surface = Surface(report.centre, report.lmax, report.coefficients)
    theta = (np.arange(samples) + 0.5) * np.pi / samples
    phi = (np.arange(2 * samples) + 0.5) * np.pi / samples
    tt, pp = (a.ravel() for a in np.meshgrid(theta, phi, indexing="ij"))
    radius = surface.radius(tt, pp)
    direction = np.stack([np.sin(tt) * np.cos(pp), np.sin(tt) * np.sin(pp), np.cos(tt)], axis=1)
    return surface.centre + radius[:, None] * direction
