"""A Brill-Lindquist pair decomposed over ranks, and the body of one rank process.

The grid: a coarse level 0 box (spacing 0.25 M, x from -8.25 to 7.75, y and z from -4 to 4) cut
into seven slabs along x, each with four ghost nodes of its neighbours (as a domain-decomposed
evolution holds them), and one level 1 box around each puncture, each cut into two halves along
y. Ranks 0, 1 and 6 own only coarse slabs far from the horizons (outside the data windows the
server asks for after the first slice), rank 7 owns nothing; ranks 2-5 hold the fine boxes. Each rank process samples only its own boxes, as an MPI rank owns only its data.
"""

from __future__ import annotations

import time
import traceback

import numpy as np

#: Bare masses (units of the total bare mass M) and puncture positions of the pair (units of M).
MASSES = (0.6, 0.4)
POSITIONS = ((1.213, 0.011, -0.007), (-1.787, -0.013, 0.009))
RANKS = 8
VARIABLE_SET = "conformal_chi"
COARSE_SPACING = 0.25
COARSE_ORIGIN = (-8.25, -4.0, -4.0)
COARSE_SHAPE = (65, 33, 33)
#: First owned node along x of each coarse slab (the last entry closes the last slab).
SLAB_BOUNDS = (0, 9, 18, 27, 37, 46, 55, 64)
GHOST_NODES = 4
#: (body, half) of the fine boxes each rank owns.
FINE_OWNERS = {2: (1, 0), 3: (1, 1), 4: (0, 0), 5: (0, 1)}
FINE_HALF_WIDTHS = (0.9, 0.6)
FINE_NODES = 25
#: Iterations sent and their coordinate times, units of M (the data are time-symmetric).
TIMES = {0: 0.0, 1: 0.5}


def spacetime():
    from penumbra_server.numerics.spacetimes import BrillLindquist

    return BrillLindquist(masses=MASSES, positions=POSITIONS)


def rank_boxes(rank: int) -> list[dict]:
    """The boxes rank ``rank`` owns (origin, spacing, shape, level), in a fixed order."""
    boxes = []
    if rank < len(SLAB_BOUNDS) - 1:
        first = max(SLAB_BOUNDS[rank] - GHOST_NODES, 0)
        last = min(SLAB_BOUNDS[rank + 1] + GHOST_NODES, COARSE_SHAPE[0] - 1)
        origin = (COARSE_ORIGIN[0] + COARSE_SPACING * first, COARSE_ORIGIN[1], COARSE_ORIGIN[2])
        boxes.append({"origin": origin, "spacing": (COARSE_SPACING,) * 3,
                      "shape": (last - first + 1, COARSE_SHAPE[1], COARSE_SHAPE[2]), "level": 0})
    if rank in FINE_OWNERS:
        body, half = FINE_OWNERS[rank]
        centre = np.asarray(POSITIONS[body])
        width = FINE_HALF_WIDTHS[body]
        h = 2 * width / (FINE_NODES - 1)
        first_j = 0 if half == 0 else (FINE_NODES - 1) // 3
        last_j = 2 * (FINE_NODES - 1) // 3 if half == 0 else FINE_NODES - 1
        origin = centre - width + np.array([0.0, first_j * h, 0.0])
        boxes.append({"origin": tuple(origin), "spacing": (h, h, h),
                      "shape": (FINE_NODES, last_j - first_j + 1, FINE_NODES), "level": 1})
    return boxes


def rank_patches(rank: int) -> list:
    from service_support import patch_data

    st = spacetime()
    return [patch_data(st, b, variable_set=VARIABLE_SET) for b in rank_boxes(rank)]


def all_patches() -> list:
    """Every rank's patches in rank order: the whole slice the ranks send between them."""
    return [p for rank in range(RANKS) for p in rank_patches(rank)]


def wait_for_windows(handle, iteration: int, timeout_s: float = 120.0):
    """Poll the server until it has issued data windows made from ``iteration`` or later."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        windows = handle.latest_windows(refresh=True)
        if windows is not None and windows.iteration >= iteration:
            return windows
        time.sleep(0.05)
    raise TimeoutError(f"no data windows made from iteration {iteration} within {timeout_s} s")


def _ack_summary(ack) -> dict:
    return {"accepted": ack.accepted, "duplicate": ack.duplicate, "waiting_for_parts": ack.waiting_for_parts,
            "parts_received": ack.parts_received, "parts_expected": ack.parts_expected,
            "bytes_sent": ack.bytes_sent, "cropped": ack.cropped, "part_index": ack.part_index}


def rank_main(address: str, run_id: str, rank: int, barrier, results) -> None:
    """One rank: send its part of iteration 0 whole, wait for the server's data windows, send its
    part of iteration 1 cropped to them (empty when its boxes miss every window)."""
    report = {"rank": rank, "acks": {}, "error": ""}
    try:
        import penumbra_shim as ps

        patches = rank_patches(rank)  # sampled once: a static slice
        with ps.connect(address, deadline_s=60.0) as client:
            handle = client.attach_run(run_id, cache_results=False)
            barrier.wait(120)  # every rank connected: the parts of iteration 0 go out together
            ticket = handle.submit_arrays(time=TIMES[0], iteration=0, patches=patches, part_index=rank,
                                          part_count=RANKS)
            report["acks"][0] = _ack_summary(ticket.result(120))
            wait_for_windows(handle, 0)
            ticket = handle.submit_arrays(time=TIMES[1], iteration=1, patches=patches, part_index=rank,
                                          part_count=RANKS, crop_to_windows=True)
            report["acks"][1] = _ack_summary(ticket.result(120))
            handle.close(close_run=False)
    except BaseException:  # reported to the parent, which fails the test with it
        report["error"] = traceback.format_exc()
    results.put(report)
