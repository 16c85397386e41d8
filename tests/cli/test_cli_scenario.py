"""The demo's invented scenario: the track shrinks as stated, grids follow the holes, slices validate."""

import numpy as np
import pytest

from penumbra_server.cli.demo_scenario import (DemoScenario, GridLayout, InspiralTrack, blended_shift_fields,
                                               brill_lindquist_w_fields)
from penumbra_server.numerics.slices import Patch, Slice, required_fields
from penumbra_server.numerics.spacetimes import BrillLindquist, sample_patch


def test_track_shrinks_from_stated_start_to_stated_end_about_the_centre_of_mass():
    track = InspiralTrack()
    times = np.linspace(0.0, track.duration, 41)
    separations = np.array([np.linalg.norm(np.subtract(*track.positions(t))) for t in times])
    assert separations[0] == pytest.approx(1.4, abs=1e-12)
    assert separations[-1] == pytest.approx(0.45, abs=1e-12)
    assert np.all(np.diff(separations) < 0)
    # Ends well below the equal-mass critical separation for a common horizon, about 0.766 M in
    # units of the total bare mass (Brill & Lindquist 1963; Cadez 1974; from memory, docs/references.md item 7).
    assert separations[-1] < 0.766 - 0.25
    for t in times:
        p = track.positions(t)
        centre_of_mass = (track.masses[0] * p[0] + track.masses[1] * p[1]) / track.total_mass
        np.testing.assert_allclose(centre_of_mass, 0.0, atol=1e-14)
        assert np.all(p[:, 2] == 0.0)


def test_phase_follows_the_kepler_frequency_of_the_current_separation():
    track = InspiralTrack()
    t, dt = 2.0, 1e-5
    omega = (track.phase(t + dt) - track.phase(t - dt)) / (2 * dt)
    assert omega == pytest.approx(np.sqrt(track.total_mass / track.separation(t) ** 3), rel=1e-8)


def test_velocities_are_the_derivative_of_the_positions():
    track = InspiralTrack()
    dt = 1e-6
    for t in (0.1, 2.0, 3.9, 4.5):  # while shrinking, and after (circular at the final separation)
        numeric = (track.positions(t + dt) - track.positions(t - dt)) / (2 * dt)
        np.testing.assert_allclose(track.velocities(t), numeric, atol=1e-8)
    # The centre of mass stays at rest.
    v = track.velocities(1.0)
    np.testing.assert_allclose(track.masses[0] * v[0] + track.masses[1] * v[1], 0.0, atol=1e-15)


def test_invented_shift_moves_each_puncture_with_the_track():
    scenario = DemoScenario()
    t = 1.3
    positions, velocities = scenario.track.positions(t), scenario.track.velocities(t)
    # A tiny box of 2 x 2 x 2 nodes around each puncture: the blend equals -v_i at puncture i.
    from penumbra_server.cli.demo_scenario import BoxSpec

    for p, v in zip(positions, velocities):
        box = BoxSpec(origin=tuple(p), spacing=1e-3, shape=(2, 2, 2), level=0)
        shift = blended_shift_fields(box, positions, velocities)
        at_puncture = np.array([shift[name][0, 0, 0] for name in ("shift_x", "shift_y", "shift_z")])
        np.testing.assert_allclose(at_puncture, -v, atol=1e-15)
        # Smooth: the next node (1e-3 M away) differs by O(1e-3 |v| / d).
        nearby = np.array([shift[name][1, 1, 1] for name in ("shift_x", "shift_y", "shift_z")])
        assert 0 < np.linalg.norm(nearby - at_puncture) < 1e-2 * np.linalg.norm(v)
    with pytest.raises(ValueError, match="velocities"):
        blended_shift_fields(scenario.layout.coarse_box(), positions, velocities[:1])


def test_outer_level_holds_the_coarse_box_on_the_coarse_lattice():
    scenario = DemoScenario()
    layout = scenario.layout
    outer, coarse = layout.outer_box(), layout.coarse_box()
    assert (outer.level, coarse.level) == (0, 1)
    assert outer.spacing == pytest.approx(2 * coarse.spacing)
    assert np.all(np.asarray(outer.origin) <= -layout.outer_half_width + outer.spacing)
    assert np.all(outer.upper >= layout.outer_half_width - outer.spacing)
    assert np.all(np.asarray(outer.origin) < np.asarray(coarse.origin)) and np.all(outer.upper > coarse.upper)
    steps = (np.asarray(coarse.origin) - np.asarray(outer.origin)) / coarse.spacing
    np.testing.assert_allclose(steps, np.round(steps), atol=1e-9)
    assert GridLayout().outer_box() is None and [b.level for b in GridLayout().boxes([[0.5, 0, 0]])] == [0, 1]
    with pytest.raises(ValueError, match="outer_half_width"):
        GridLayout(outer_half_width=1.0)


def test_fine_boxes_follow_the_punctures_on_the_fine_lattice_inside_the_coarse_box():
    scenario = DemoScenario()
    layout = scenario.layout
    coarse = layout.coarse_box()
    for index in range(scenario.slice_count):
        boxes = scenario.boxes_at(index)
        assert [b.level for b in boxes] == [0, 1, 2, 2]
        for box, puncture in zip(boxes[2:], scenario.track.positions(scenario.time_of(index))):
            assert box.spacing == pytest.approx(coarse.spacing / 2)
            centre = (np.asarray(box.origin) + box.upper) / 2
            assert np.max(np.abs(centre - puncture)) <= box.spacing / 2 + 1e-12
            # On the fine lattice: an integer number of fine spacings from the coarse origin.
            steps = (np.asarray(box.origin) - np.asarray(coarse.origin)) / box.spacing
            np.testing.assert_allclose(steps, np.round(steps), atol=1e-9)
            assert np.all(np.asarray(box.origin) >= np.asarray(coarse.origin) - 1e-12)
            assert np.all(box.upper <= coarse.upper + 1e-12)
        # No node on (or very near) a puncture: the orbital plane lies half-way between fine nodes.
        assert scenario.nearest_node_distance(index) >= 0.5 * layout.fine_spacing - 1e-12


def test_sampled_slices_validate_and_match_the_brill_lindquist_formula():
    scenario = DemoScenario(layout=GridLayout(coarse_nodes=16, coarse_half_width=1.5, fine_nodes=10))
    for index in (0, scenario.slice_count - 1):
        positions = scenario.track.positions(scenario.time_of(index))
        spacetime = BrillLindquist(np.asarray(scenario.track.masses), positions)
        patches = []
        for box in scenario.boxes_at(index):
            patch = sample_patch(spacetime, origin=box.origin, spacing=(box.spacing,) * 3, shape=box.shape,
                                 level=box.level, variable_set="conformal_w")
            direct = brill_lindquist_w_fields(box, scenario.track.masses, positions)
            for name in required_fields("conformal_w"):
                np.testing.assert_allclose(patch.fields[name], direct[name], rtol=1e-12, atol=1e-13, err_msg=name)
            patches.append(Patch(origin=box.origin, spacing=(box.spacing,) * 3, shape=box.shape, level=box.level,
                                 fields={n: patch.fields[n] for n in required_fields("conformal_w")}))
        sl = Slice(time=scenario.time_of(index), iteration=scenario.iteration_of(index),
                   variable_set="conformal_w", patches=tuple(patches))
        sl.check_finite()
        w = sl.patches[0].fields["W"]
        assert np.all((w > 0) & (w < 1))


def test_sampled_slices_pass_the_shim_validation():
    import penumbra_shim as ps

    from penumbra_server.cli.demo_evolution import slice_arrays

    scenario = DemoScenario(layout=GridLayout(coarse_nodes=16, coarse_half_width=1.5, fine_nodes=10))
    arrays = slice_arrays(scenario, 3)
    outgoing = ps.build_slice(**arrays)
    assert len(outgoing.patches) == 3
    assert [p.level for p in outgoing.patches] == [0, 1, 1]
    assert outgoing.nbytes == sum(a.nbytes for p in arrays["patches"] for a in p.fields.values())
    assert set(outgoing.patches[0].fields) == set(ps.required_fields("conformal_w")) | {"shift_x", "shift_y", "shift_z"}
    assert set(ps.build_slice(**slice_arrays(scenario, 3, shift=False)).patches[0].fields) == set(
        ps.required_fields("conformal_w"))
    # The same validation refuses a corrupted copy (so passing above means something).
    bad = dict(arrays["patches"][1].fields)
    bad["W"] = bad["W"].copy()
    bad["W"][3, 4, 5] = np.nan
    broken = [arrays["patches"][0], ps.PatchData(origin=arrays["patches"][1].origin, spacing=arrays["patches"][1].spacing,
                                                 level=1, fields=bad)]
    with pytest.raises(ps.SliceValidationError, match="W"):
        ps.build_slice(time=arrays["time"], iteration=arrays["iteration"], variable_set="conformal_w", patches=broken)


def test_bad_scenario_values_are_refused_with_the_field_named():
    with pytest.raises(ValueError, match="initial_separation"):
        InspiralTrack(initial_separation=0.3, final_separation=0.5)
    with pytest.raises(ValueError, match="masses"):
        InspiralTrack(masses=(0.6, -0.4))
    with pytest.raises(ValueError, match="coarse_nodes"):
        GridLayout(coarse_nodes=4)
