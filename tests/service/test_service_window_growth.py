"""Expired data windows are grown, not dropped: a slice later than the windows' validity goes
cropped to the windows widened by the server's speed bound times the lag, and whole only when
the widened windows would keep nearly all of it.

The lag is forced by the slices' times (far past ``valid_until``), not by loading the server.
"""

from __future__ import annotations

import numpy as np

import penumbra_shim as ps
from penumbra_server.tracking.motion import UNKNOWN_SPEED

from service_support import LONE_CENTRE, box, lone_hole, patch_data
from tracking_support import wait_for_windows

REGRID_INTERVAL = 1.0


def _two_level_slice(iteration: int, time: float) -> ps.OutgoingSlice:
    """A lone hole of mass 1 on a fine box (half-width 1.2 M) inside a coarse one (half-width 6 M),
    so that windows about the hole leave most of the coarse box out."""
    hole = lone_hole()
    patches = [patch_data(hole, box(LONE_CENTRE, 6.0, 37, level=0)),
               patch_data(hole, box(LONE_CENTRE, 1.2, 33, level=1))]
    return ps.build_slice(time=time, iteration=iteration, variable_set="adm", patches=patches)


def _spec() -> ps.RunSpec:
    return ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", LONE_CENTRE, 1.0),), name="expired windows",
                      finder=ps.FinderOptions(lmax=6, tolerance=1e-8), backlog=ps.BacklogOptions(queue_depth=4),
                      refinement=ps.RefinementOptions(steering_interval=REGRID_INTERVAL))


def test_windows_state_a_speed_bound_and_an_expired_window_is_grown_not_sent_whole(client):
    run = client.open_run(_spec(), crop_to_windows=True)
    assert run.submit(_two_level_slice(0, 0.0)).result(60).accepted
    windows = wait_for_windows(run, 0)
    # One horizon point: no forecast to bound the motion, so the server states the speed of light.
    assert windows.speed_bound == UNKNOWN_SPEED and windows.growth_cap == 0.0
    assert windows.valid_from == 0.0 and windows.valid_until == REGRID_INTERVAL

    # A slice half a regrid interval past valid_until (as if the server lagged behind).
    t_late = windows.valid_until + 0.5
    late = _two_level_slice(1, t_late)
    ack = run.submit(late).result(60)
    assert ack.accepted and ack.cropped
    assert run.stats.grown == 1 and run.stats.sent_whole == 1 and run.stats.whole_without_windows == 1
    # Exactly the crop to the windows widened by speed_bound x lag on every side (computed here
    # from the windows' corners, not through the shim's growth function).
    growth = windows.speed_bound * (t_late - windows.valid_until)
    bounds = windows.bounds()
    grown = np.stack([bounds[:, 0] - growth, bounds[:, 1] + growth], axis=1)
    expected = ps.crop_outgoing_slice(late, grown, extra_nodes=windows.extra_nodes)
    unchanged = ps.crop_outgoing_slice(late, bounds, extra_nodes=windows.extra_nodes)
    assert ack.bytes_sent == expected.nbytes
    assert unchanged.nbytes < ack.bytes_sent < 0.9 * late.nbytes
    print(f"\nexpired windows: lag {t_late - windows.valid_until:g} M, growth {growth:g} M per side; bytes "
          f"ungrown {unchanged.nbytes}, grown {ack.bytes_sent}, whole {late.nbytes}")
    after = wait_for_windows(run, 1)

    # Far later (growth 20 M, beyond the 6 M grid): the grown windows would keep nearly
    # everything, so the slice goes whole.
    assert after.speed_bound > 0
    t_very_late = after.valid_until + 20.0 / after.speed_bound
    ack = run.submit(_two_level_slice(2, t_very_late)).result(60)
    assert ack.accepted and not ack.cropped
    assert run.stats.whole_nearly_all == 1 and run.stats.grown == 1 and run.stats.sent_whole == 2
    wait_for_windows(run, 2)
    run.close()
    found = [e.iteration for e in client.watch(run.run_id, timeout_s=600) if e.kind == "surface_found"]
    assert found == [0, 1, 2]
