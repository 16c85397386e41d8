"""How close to the critical separation the service's own common-horizon search finds the common
horizon of Brill-Lindquist pairs (Brill & Lindquist, Phys. Rev. 131, 471 (1963)), mass ratios 1, 2, 4.

For each separation d: the server's planner (SteeringPlanner with its RunSteering) and search
(search_plan -> run_surface_job, the function the worker processes run) on two slices of the same
static pair, as a run processes them: the first finds the bodies, the second runs the common
search from the watch's own seed. Bisection on d for the largest separation found, compared with
the critical separation of the independent axisymmetric solver (tests/numerics/axisymmetric_mots.py,
cached below; the equal-mass value agrees with the published 1.53 m per bare mass, shared
references item 7).

Run: PYTHONPATH=client:service python tests/benchmarks/bench_common_formation.py [--spacing 0.03] [--q 1 2 4]
Units: the total bare mass M = m1 + m2 = 1.
"""

from __future__ import annotations

import argparse
import asyncio
import time

import numpy as np

from penumbra_server.cli.demo_scenario import BoxSpec, brill_lindquist_w_fields
from penumbra_server.numerics.slices import Patch, Slice
from penumbra_server.server._spec import DEFAULT_LMAX_CAP, DEFAULT_LMAX_COMMON, BodySpec, RunSettings
from penumbra_server.server.jobs import SERVICE_INTERPOLATION_ORDER, run_surface_job
from penumbra_server.server.planning import SteeringPlanner
from penumbra_server.server.search import search_plan
from penumbra_server.server.steering import RunSteering
from penumbra_server.server.surface_state import record_outcome

#: d_c / M by tests/numerics/axisymmetric_mots.py (critical_separation), as in
#: tests/service/test_service_common_formation.py.
CRITICAL_SEPARATION = {1: 0.76620, 2: 0.74663, 4: 0.69872}


class InlineExecutor:
    """The worker's function in this process (a benchmark of the numerics, not of the pool)."""

    async def run(self, job):
        return run_surface_job(job)

    async def close(self):
        pass


def _cube(half: float, h: float, level: int) -> BoxSpec:
    n = int(round(2 * half / h)) + 1
    return BoxSpec(origin=tuple(-half + o * h for o in (0.27, 0.31, 0.23)), spacing=h, shape=(n, n, n), level=level)


def _slice(index: int, masses, positions, spacing: float) -> Slice:
    boxes = [_cube(1.6, 0.08, 0), _cube(0.85, spacing, 1)]
    patches = tuple(Patch(origin=b.origin, spacing=(b.spacing,) * 3, shape=b.shape, level=b.level,
                          fields=brill_lindquist_w_fields(b, masses, positions)) for b in boxes)
    return Slice(time=0.5 * index, iteration=index, variable_set="conformal_w", patches=patches)


def common_outcome(q: float, d: float, spacing: float):
    """The common search's outcome in the second slice of a static pair at separation d."""
    m1, m2 = q / (1 + q), 1 / (1 + q)
    positions = np.array([[m2 * d, 0.0, 0.0], [-m1 * d, 0.0, 0.0]])
    settings = RunSettings(display_name="bench", variable_set="conformal_w", mass_scale_solar_masses=0.0,
                           bodies=(BodySpec("A", tuple(positions[0]), m1), BodySpec("B", tuple(positions[1]), m2)),
                           lmax=8, tolerance=1e-8, max_iterations=40, queue_depth=4,
                           lmax_common=DEFAULT_LMAX_COMMON, lmax_cap=DEFAULT_LMAX_CAP)
    steering = RunSteering(settings, interpolation_order=SERVICE_INTERPOLATION_ORDER)
    planner = SteeringPlanner(steering)
    executor = InlineExecutor()
    for index in range(2):
        slice_ = _slice(index, (m1, m2), positions, spacing)
        plans = planner.plan(settings, {}, slice_)
        outcomes = [asyncio.run(search_plan(p, slice_, executor=executor, settings=settings,
                                            interpolation_order=SERVICE_INTERPOLATION_ORDER)) for p in plans]
        for outcome in outcomes:
            record_outcome(steering.states[outcome.label], outcome, time=slice_.time, iteration=slice_.iteration)
        steering.observe(slice_, plans, outcomes)
    common = [o for o in outcomes if o.label == "common"]
    return common[0] if common else None


def largest_found(q: int, spacing: float, *, low: float, high: float, tolerance: float):
    d_c = CRITICAL_SEPARATION[q]
    lo, hi = low * d_c, high * d_c
    log = []

    def trial(d):
        start = time.perf_counter()
        outcome = common_outcome(q, d, spacing)
        found = outcome is not None and outcome.found
        note = "no common search planned" if outcome is None else outcome.message[:150]
        log.append((d, found))
        print(f"  q={q} d={d:.5f} ({d / d_c - 1:+.4%} of d_c): {'found' if found else 'not found'} "
              f"[{time.perf_counter() - start:.0f} s] {note}", flush=True)
        return found

    if not trial(lo):
        return None, log
    if trial(hi):
        return hi, log
    while hi - lo > tolerance * d_c:
        mid = 0.5 * (lo + hi)
        if trial(mid):
            lo = mid
        else:
            hi = mid
    return lo, log


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--spacing", type=float, default=0.03, help="fine-level spacing, M")
    parser.add_argument("--q", type=int, nargs="+", default=[1, 2, 4])
    parser.add_argument("--low", type=float, default=0.985, help="lower end of the bracket, in d_c")
    parser.add_argument("--high", type=float, default=1.005, help="upper end of the bracket, in d_c")
    parser.add_argument("--tolerance", type=float, default=0.001, help="bracket width to stop at, in d_c")
    args = parser.parse_args()
    print(f"fine spacing {args.spacing} M, interpolation order {SERVICE_INTERPOLATION_ORDER}, "
          f"lmax_common {DEFAULT_LMAX_COMMON}, lmax_cap {DEFAULT_LMAX_CAP}")
    rows = []
    for q in args.q:
        d, _ = largest_found(q, args.spacing, low=args.low, high=args.high, tolerance=args.tolerance)
        rows.append((q, d))
    print("\n   q   d_c (reference)   largest d found   gap (d_c - d) / d_c   (bracket width "
          f"{args.tolerance:.1%} of d_c)")
    for q, d in rows:
        d_c = CRITICAL_SEPARATION[q]
        if d is None:
            print(f"  {q:2d}   {d_c:.5f}           none at {args.low} d_c")
        else:
            print(f"  {q:2d}   {d_c:.5f}           {d:.5f}           {(d_c - d) / d_c:+.2%}")


if __name__ == "__main__":
    main()
