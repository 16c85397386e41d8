"""What a production-like run sends: whole slices against slices cropped to the data windows.

Run: python tests/benchmarks/bench_production_windows.py  (prints figures; a whole slice is
about 2.2 GiB, held once by the ranks and once by the server, so about 5 GiB at peak; several
minutes on two cores). Its last line is ``whole/cropped bytes: <ratio>`` (over every cropped
slice, the first included).

The layout is that of a binary evolved with nested boxes (box-in-box mesh refinement):

* an equal-mass Brill-Lindquist pair (bare masses 0.5 + 0.5, total M = 1) at coordinate
  separation 10 M on the x axis (Brill & Lindquist, Phys. Rev. 131, 471 (1963); the fields are
  analytic, so every level is filled cheaply: W = psi^-2, gamma_tilde_ij = delta_ij, A_tilde_ij
  = 0, trace_K = 0);
* 9 levels with a factor 2 between spacings, the finest M/50 at the holes: levels 1-6 one box
  each about the pair's centre (level 1 reaching about 325 M from it), levels 7-9 one box per
  hole; every node of a coarse level lies on the lattice of the finer ones, offset by a quarter
  of the finest spacing so no node sits on a puncture;
* a domain decomposition: each box cut into sub-boxes, one per rank (shared levels 3 x 3 x 3,
  per-hole levels 2 x 2 x 2), 210 ranks, each sending its owned nodes plus a ghost zone of 4
  nodes (the server takes every point's stencil from one patch, so without ghost zones points
  near a cut between ranks cannot be evaluated and the finder fails there).

A real server runs on loopback. Run "whole" receives every slice whole; run "cropped" receives
the first slice whole (so that the server issues windows) and then, for each later slice, every
rank crops its own boxes to the windows the server issued after the previous slice
(penumbra_shim.crop_outgoing_slice, with the server's stencil nodes). The cropped parts are
combined into one slice here; see :func:`send_parts` for the one place that changes when each
rank sends its own part of a multi-part slice. The holes do not move (the data are
time-symmetric), which is all a byte count needs; the server still tracks and forecasts them.
The surfaces found in both runs are compared (areas and centroids), and the crop of a slice the
server lags behind by 2 M (windows grown by its speed bound, cropping.grow_expired_windows) is
measured too.
"""

from __future__ import annotations

import argparse
import resource
import sys
import tempfile
import time
from dataclasses import dataclass

import numpy as np

import penumbra_shim as ps
from penumbra_shim.cropping import grow_expired_windows
from penumbra_server.numerics.spacetimes import BrillLindquist
from penumbra_server.server import BackgroundServer, ServerOptions

LEVELS = 9
FINEST_SPACING = 0.02  # M/50 at the holes
SHARED_LEVELS = 6      # levels 1..6: one box about the pair; 7..9: one box per hole
SHARED_NODES = 128     # nodes per side of a shared box (level 1 reaches ~325 M)
HOLE_NODES = 64        # nodes per side of a per-hole box (level 9 reaches ~0.63 M about the hole)
SHARED_CUTS = 3        # sub-boxes per axis of a shared box (27 ranks each)
HOLE_CUTS = 2          # sub-boxes per axis of a per-hole box (8 ranks each)
# Ghost nodes of a rank beyond its owned region, sent with it (a common width for 4th-order
# differencing): the server evaluates every point from one patch, so its stencils must fit
# inside some rank's box; without ghost zones the finder fails near the cuts between ranks.
GHOST_NODES = 4
MASSES = (0.5, 0.5)
POSITIONS = ((5.0, 0.0, 0.0), (-5.0, 0.0, 0.0))
SEPARATION = 10.0
SLICE_INTERVAL = 1.0   # M between slices
CROPPED_SLICES = 6     # slices after the first, sent cropped (and whole to the other run)
LAG = 2.0              # M past the windows' validity, for the "server lagging" figure
VARIABLE_SET = "conformal_w"


@dataclass(frozen=True)
class RankBox:
    """One rank's sub-box: vertex-centred, ``shape`` nodes from ``origin`` at ``spacing`` (M)."""

    rank: int
    level: int
    origin: tuple[float, float, float]
    spacing: float
    shape: tuple[int, int, int]

    @property
    def nodes(self) -> int:
        return int(np.prod(self.shape))


def _box_about(centre, level: int, nodes: int) -> tuple[np.ndarray, float]:
    """Origin (on the common lattice) and spacing of a cube of ``nodes`` per side about ``centre``."""
    h = FINEST_SPACING * 2 ** (LEVELS - level)
    offset = 0.25 * FINEST_SPACING  # the common lattice: x = offset + k h_finest
    start = np.round((np.asarray(centre, float) - 0.5 * (nodes - 1) * h - offset) / h) * h + offset
    return start, h


def hierarchy() -> list[RankBox]:
    """Every rank's sub-box, coarsest level first (module docstring)."""
    boxes = []
    centre = np.mean(np.asarray(POSITIONS), axis=0)
    for level in range(1, LEVELS + 1):
        if level <= SHARED_LEVELS:
            boxes += _cut(*_box_about(centre, level, SHARED_NODES), SHARED_NODES, level, SHARED_CUTS, len(boxes))
        else:
            for p in POSITIONS:
                boxes += _cut(*_box_about(p, level, HOLE_NODES), HOLE_NODES, level, HOLE_CUTS, len(boxes))
    return boxes


def _cut(origin, h, nodes, level, cuts, first_rank) -> list[RankBox]:
    """A cube of ``nodes`` per side cut into ``cuts``^3 sub-boxes, each with its ghost zone
    (:data:`GHOST_NODES` beyond the shared face, clipped to the cube)."""
    edges = np.round(np.linspace(0, nodes - 1, cuts + 1)).astype(int)
    out = []
    for i in range(cuts):
        for j in range(cuts):
            for k in range(cuts):
                lo = np.maximum(np.array([edges[i], edges[j], edges[k]]) - GHOST_NODES, 0)
                hi = np.minimum(np.array([edges[i + 1], edges[j + 1], edges[k + 1]]) + GHOST_NODES, nodes - 1)
                out.append(RankBox(rank=first_rank + len(out), level=level,
                                   origin=tuple(float(v) for v in origin + lo * h), spacing=h,
                                   shape=tuple(int(v) for v in hi - lo + 1)))
    return out


def rank_slice(box: RankBox, spacetime: BrillLindquist, *, time_m: float, iteration: int) -> ps.OutgoingSlice:
    """One rank's data of a slice (its one sub-box), validated and copied by build_slice."""
    axes = [box.origin[a] + box.spacing * np.arange(box.shape[a]) for a in range(3)]
    points = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    psi = spacetime.conformal_factor(points).reshape(box.shape)
    zeros = np.zeros(box.shape)
    fields = {"W": psi ** -2, "trace_K": zeros}
    for suffix in ("xx", "xy", "xz", "yy", "yz", "zz"):
        fields[f"gamma_tilde_{suffix}"] = np.ones(box.shape) if suffix in ("xx", "yy", "zz") else zeros
        fields[f"A_tilde_{suffix}"] = zeros
    patch = ps.PatchData(origin=box.origin, spacing=(box.spacing,) * 3, fields=fields, level=box.level)
    return ps.build_slice(time=time_m, iteration=iteration, variable_set=VARIABLE_SET, patches=[patch])


def with_time(part: ps.OutgoingSlice, *, time_m: float, iteration: int) -> ps.OutgoingSlice:
    """The same data stamped with another time and iteration (the holes do not move; no copy)."""
    return ps.OutgoingSlice(time=time_m, iteration=iteration, variable_set=part.variable_set, patches=part.patches)


def send_parts(run: ps.RunHandle, parts: list[ps.OutgoingSlice], *, time_m: float, iteration: int) -> ps.SliceAck:
    """Send one slice combined into a single stream (what one sender holding everything does)."""
    combined = ps.OutgoingSlice(time=time_m, iteration=iteration, variable_set=VARIABLE_SET,
                                patches=tuple(p for part in parts for p in part.patches))
    ack = run.submit(combined).result(600)
    if not ack.accepted:
        raise RuntimeError(f"slice {iteration} was not accepted: {ack}")
    return ack


def send_rank_parts(run: ps.RunHandle, cuts: list[ps.OutgoingSlice | None], *, time_m: float,
                    iteration: int) -> None:
    """Every rank sends its own part of the slice (part_index = rank), an empty part where its
    boxes meet no window; the server assembles the slice when all parts are in. In a real run
    each rank does this from its own process; here one handle sends them all in turn."""
    tickets = []
    for rank, cut in enumerate(cuts):
        part = ps.OutgoingSlice(time=time_m, iteration=iteration, variable_set=VARIABLE_SET,
                                patches=cut.patches if cut is not None else (), part_index=rank,
                                part_count=len(cuts))
        tickets.append(run.submit(part))
    acks = [ticket.result(600) for ticket in tickets]
    refused = [a for a in acks if not a.accepted]
    if refused:
        raise RuntimeError(f"slice {iteration}: {len(refused)} parts were not accepted, e.g. {refused[0]}")


def crop_ranks(parts: list[ps.OutgoingSlice], windows: ps.DataWindows, bounds=None) -> list[ps.OutgoingSlice | None]:
    """Every rank's own crop of its part to the windows (None: the rank sends nothing)."""
    bounds = windows.bounds() if bounds is None else bounds
    return [ps.crop_outgoing_slice(part, bounds, extra_nodes=windows.extra_nodes) for part in parts]


def wait_for_windows(run: ps.RunHandle, iteration: int, timeout_s: float = 900.0) -> ps.DataWindows:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        windows = run.latest_windows()
        if windows is not None and windows.iteration >= iteration:
            return windows
        time.sleep(0.1)
    raise TimeoutError(f"no data windows for iteration {iteration} within {timeout_s} s")


def surfaces(client, run_id: str) -> dict:
    return {(e.iteration, e.surface.label): e.surface for e in client.watch(run_id, timeout_s=120)
            if e.kind == "surface_found"}


def spec(name: str) -> ps.RunSpec:
    bodies = (ps.Body("plus", POSITIONS[0], MASSES[0]), ps.Body("minus", POSITIONS[1], MASSES[1]))
    return ps.RunSpec(variable_set=VARIABLE_SET, bodies=bodies, name=name,
                      finder=ps.FinderOptions(lmax=8, tolerance=1e-9),
                      backlog=ps.BacklogOptions(queue_depth=2),
                      refinement=ps.RefinementOptions(steering_interval=SLICE_INTERVAL, nesting_depth=LEVELS))


def _mib(n: float) -> str:
    return f"{n / 2**20:.1f} MiB"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workers", type=int, default=1, help="server finder processes (default 1)")
    args = parser.parse_args(argv)

    boxes = hierarchy()
    spacetime = BrillLindquist(masses=MASSES, positions=POSITIONS)
    t0 = time.perf_counter()
    parts = [rank_slice(b, spacetime, time_m=0.0, iteration=0) for b in boxes]
    whole_bytes = sum(p.nbytes for p in parts)
    print(f"layout: {LEVELS} levels, spacing {FINEST_SPACING * 2 ** (LEVELS - 1):g} M .. {FINEST_SPACING:g} M; "
          f"level 1 reaches {0.5 * (SHARED_NODES - 1) * FINEST_SPACING * 2 ** (LEVELS - 1):.0f} M from the pair's "
          f"centre; {len(boxes)} ranks, {sum(b.nodes for b in boxes) / 1e6:.2f} M nodes, {_mib(whole_bytes)} per "
          f"whole slice ({VARIABLE_SET}, float64); built in {time.perf_counter() - t0:.1f} s")
    for level in range(1, LEVELS + 1):
        mine = [b for b in boxes if b.level == level]
        print(f"  level {level}: spacing {mine[0].spacing:g} M, {len(mine)} ranks, "
              f"{sum(b.nodes for b in mine) / 1e6:.3f} M nodes")

    # A whole slice of this layout is above the server's default limit of 2 GiB per slice.
    options = ServerOptions(workers=args.workers, max_slice_bytes=4 * 1024**3)
    with tempfile.TemporaryDirectory(prefix="penumbra-bench-windows-") as root, \
            BackgroundServer("127.0.0.1:0", archive_root=root, workers=args.workers, options=options) as server, \
            ps.connect(server.address, deadline_s=120.0) as client:
        whole_run = client.open_run(spec("production layout, whole"))
        # One handle sends every rank's part here: its local queue must hold a whole slice of parts.
        cropped_run = client.open_run(spec("production layout, cropped"), queue_depth=len(parts) + 1)
        for run in (whole_run, cropped_run):
            send_parts(run, parts, time_m=0.0, iteration=0)
            wait_for_windows(run, 0)
        print(f"first slice sent whole to both runs; windows: "
              f"{[(w.name, np.round(w.upper - w.lower, 3).tolist()) for w in cropped_run.latest_windows().windows]}")
        totals = {"whole": 0, "cropped": 0}
        senders, per_slice = [], []
        for index in range(1, CROPPED_SLICES + 1):
            t = index * SLICE_INTERVAL
            stamped = [with_time(p, time_m=t, iteration=index) for p in parts]
            windows = wait_for_windows(cropped_run, index - 1)
            if not windows.covers(t):
                raise RuntimeError(f"windows of iteration {windows.iteration} do not cover t = {t}: {windows}")
            t_crop = time.perf_counter()
            cuts = crop_ranks(stamped, windows)
            crop_s = time.perf_counter() - t_crop
            sending = [c for c in cuts if c is not None]
            sent_bytes = sum(c.nbytes for c in sending)
            totals["whole"] += whole_bytes
            totals["cropped"] += sent_bytes
            per_slice.append(whole_bytes / sent_bytes)
            senders.append(len(sending))
            print(f"slice {index} (t = {t:g} M): windows of iteration {windows.iteration} (speed bound "
                  f"{windows.speed_bound:.3g} M/M, cap {windows.growth_cap:.3g} M); ranks sending data: "
                  f"{len(sending)} of {len(parts)}; {_mib(sent_bytes)} cropped against {_mib(whole_bytes)} whole "
                  f"(ratio {whole_bytes / sent_bytes:.1f}); all ranks' crops took {crop_s:.2f} s")
            send_rank_parts(cropped_run, cuts, time_m=t, iteration=index)
            send_parts(whole_run, stamped, time_m=t, iteration=index)
            wait_for_windows(whole_run, index)
            del stamped, cuts, sending
        last = wait_for_windows(cropped_run, CROPPED_SLICES)

        # A server lagging behind: the next slice LAG M past the windows' validity.
        t_late = last.valid_until + LAG
        growth = last.grown_bounds(t_late)
        late = crop_ranks([with_time(p, time_m=t_late, iteration=99) for p in parts], last, growth.bounds)
        late_bytes = sum(c.nbytes for c in late if c is not None)
        late_ranks = sum(c is not None for c in late)
        print(f"server lagging {LAG:g} M past the windows' validity: windows grown by {growth.growth:.3g} M "
              f"({'capped' if growth.capped else 'speed bound x lag'}); ranks sending data: {late_ranks} of "
              f"{len(parts)}; {_mib(late_bytes)} cropped, whole/cropped {whole_bytes / late_bytes:.1f}")
        # The holes here rest, so the stated bound is the floor; an orbiting pair at this
        # separation moves at the Kepler speed omega r = sqrt(M / d^3) d / 2 (Newtonian, common
        # practice for an estimate), which the server would state times its safety factor 1.5.
        orbital = 1.5 * np.sqrt(1.0 / SEPARATION ** 3) * SEPARATION / 2
        fast = grow_expired_windows(last.bounds(), time=t_late, valid_from=last.valid_from,
                                    valid_until=last.valid_until, speed_bound=orbital)
        late = crop_ranks([with_time(p, time_m=t_late, iteration=99) for p in parts], last, fast.bounds)
        late_bytes = sum(c.nbytes for c in late if c is not None)
        print(f"  the same lag at an orbiting pair's speed bound {orbital:.3g} M/M: grown by {fast.growth:.3g} M; "
              f"ranks sending data: {sum(c is not None for c in late)} of {len(parts)}; whole/cropped "
              f"{whole_bytes / late_bytes:.1f}")
        del late

        whole_run.close()
        cropped_run.close()
        found_whole, found_cropped = surfaces(client, whole_run.run_id), surfaces(client, cropped_run.run_id)
    compared = sorted(k for k in found_whole if k[0] >= 1)
    if not compared or set(compared) != {k for k in found_cropped if k[0] >= 1}:
        print(f"surfaces differ: whole {sorted(found_whole)}, cropped {sorted(found_cropped)}")
        return 1
    worst_area, worst_centroid = 0.0, 0.0
    for key in compared:
        a, b = found_whole[key], found_cropped[key]
        rel = abs(a.area - b.area) / a.area
        shift = float(np.max(np.abs(np.asarray(a.centroid) - np.asarray(b.centroid))))
        worst_area, worst_centroid = max(worst_area, rel), max(worst_centroid, shift)
        print(f"  iteration {key[0]} {key[1]:>5}: area whole {a.area:.12f}, cropped {b.area:.12f}; centroid whole "
              f"{np.round(a.centroid, 9).tolist()}, cropped {np.round(b.centroid, 9).tolist()}")
    print(f"same surfaces from whole and cropped data: {len(compared)} compared, largest relative area "
          f"difference {worst_area:.1e}, largest centroid difference {worst_centroid:.1e} M")
    if worst_area > 1e-10 or worst_centroid > 1e-10:
        print("the surfaces DIFFER beyond 1e-10")
        return 1
    print(f"per cropped slice whole/cropped: {', '.join(f'{r:.1f}' for r in per_slice)} (the first with windows "
          f"made from one find, whose motion the server does not know yet)")
    print(f"bytes over the {CROPPED_SLICES} cropped slices: {_mib(totals['whole'])} whole, {_mib(totals['cropped'])} "
          f"cropped")
    print(f"peak resident memory of this process (ranks and server; finder workers apart): "
          f"{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20:.1f} GiB")
    print(f"ranks sending data: {max(senders)} of {len(parts)}")
    print(f"whole/cropped bytes: {totals['whole'] / totals['cropped']:.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
