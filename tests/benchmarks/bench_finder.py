"""Finder benchmark: prints figures, asserts nothing (run: make bench).

Everything is measured side by side in one run; the machine is shared, so read ratios, not
absolute seconds. Data: one Brill-Lindquist hole (isotropic Schwarzschild, m = 1) sampled in
the W variable set, an unequal pair for the shape-rich case, and Kerr-Schild Schwarzschild in ADM
variables (docs/references.md item 2: area 16 pi M^2) for the comparison with an independent
scipy finder (tests/benchmarks/peer_spline_finder.py).

Sections 5-7 print the figures quoted in DEVELOPERS.md, "The finder", among them exactly the two lines
``iteration cost / gather floor: <ratio>`` and ``find r/dx=50 over r/dx=12.5: <ratio>, peak MiB <n>``.
Section 8 prints ``constant-expansion search / common-horizon find: <ratio>`` (the cost of one
formation-forecast search). Run one section alone with ``--only 5`` (or 6, 7, 8).
"""

from __future__ import annotations

import dataclasses
import json
import subprocess
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

from penumbra_server.numerics.finder import FinderSettings, find_surface
from penumbra_server.numerics.guesses import guess_from_previous
from penumbra_server.numerics.interpolation import grid_geometry
from penumbra_server.numerics.expansion import expansion_at
from penumbra_server.numerics.measures import measure_surface
from penumbra_server.numerics.spacetimes import BrillLindquist, SchwarzschildKerrSchild, sample_slice
from penumbra_server.numerics.surfaces import Surface, angular_grid


def best_of(fn, repeat=5):
    times = []
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def cube(centre, half_width, spacing, level=0):
    n = int(round(2 * half_width / spacing)) + 1
    return dict(origin=np.asarray(centre) - half_width + 0.37 * spacing, spacing=[spacing] * 3, shape=[n] * 3, level=level)


def settings_of(**options) -> FinderSettings:
    """FinderSettings with the options this version of the finder knows (the benchmark also runs
    on older commits for before/after figures)."""
    known = {f.name for f in dataclasses.fields(FinderSettings)}
    return FinderSettings(**{k: v for k, v in options.items() if k in known})


def main() -> None:
    only = sys.argv[sys.argv.index("--only") + 1] if "--only" in sys.argv else None
    if only in (None, "1-4"):
        sections_1_to_4()
    if only in (None, "5"):
        peer_comparison()
    if only in (None, "6"):
        iteration_cost()
    if only in (None, "7"):
        resolution_scaling()
    if only in (None, "8"):
        constant_expansion_cost()


def sections_1_to_4() -> None:
    pair = BrillLindquist(masses=np.array([0.6, 0.4]), positions=np.array([[0.55, 0.1, 0.0], [-0.8, -0.15, 0.0]]))
    centre = pair.positions[0]
    spacing = 0.025
    sl = sample_slice(pair, [cube(centre, 0.8, spacing)], variable_set="conformal_w")
    print(f"data: unequal Brill-Lindquist pair, hole of bare mass 0.6, dx = {spacing} M, "
          f"{sl.patches[0].shape[0]}^3 nodes around it")

    print("\n1. one expansion evaluation (interpolation + algebra), grid data")
    for lmax in (8, 12, 16):
        grid = angular_grid(lmax)
        s = Surface.sphere(centre, 0.3, lmax)
        rd = s.on_grid(grid)
        pts = s.points(rd)
        prep, geo = best_of(lambda: grid_geometry(sl, pts.min(0) - 0.1, pts.max(0) + 0.1), 3)
        t_eval, _ = best_of(lambda: expansion_at(rd, geo(pts)))
        print(f"   l_max {lmax:2d}: {grid.size:4d} nodes, {t_eval * 1e3:7.2f} ms per evaluation "
              f"(sub-box preparation once per find: {prep * 1e3:.1f} ms)")

    print("\n2. Newton find, l_max 12, tolerance 1e-9 (multiples of one evaluation)")
    lmax = 12
    grid = angular_grid(lmax)
    settings = FinderSettings(lmax=lmax, tolerance=1e-9)
    guess = Surface.sphere(centre + [0.03, 0.0, 0.0], 0.4, lmax)
    rd = guess.on_grid(grid)
    pts = guess.points(rd)
    geo = grid_geometry(sl, pts.min(0) - 0.15, pts.max(0) + 0.15)
    t_eval, _ = best_of(lambda: expansion_at(rd, geo(pts)))
    t_sphere, res = best_of(lambda: find_surface(sl, guess, settings=settings), 3)
    print(f"   from a sphere guess: {t_sphere * 1e3:.0f} ms = {t_sphere / t_eval:.0f} evaluations' time; "
          f"{res.nit} iterations, {res.geometry_evaluations} geometry evaluations, status {res.status}, "
          f"max|Theta| {res.residual_max:.2e}")
    prev = guess_from_previous(res.surface, res.surface.centre + [0.01, 0.005, 0.0])
    t_prev, res_prev = best_of(lambda: find_surface(sl, prev, settings=settings), 3)
    print(f"   from the previous solution moved by 0.011 M: {t_prev * 1e3:.0f} ms = {t_prev / t_eval:.0f} "
          f"evaluations; {res_prev.nit} iterations")

    print("\n3. fast flow against Newton at the same final residual, same data and guess")
    target = res.residual_max * 1.0001
    t_newton, r_newton = best_of(lambda: find_surface(sl, guess, settings=FinderSettings(lmax=lmax, tolerance=target)), 3)
    flow_settings = FinderSettings(lmax=lmax, tolerance=target, method="flow", flow_iterations=5000)
    t_flow, r_flow = best_of(lambda: find_surface(sl, guess, settings=flow_settings), 1)
    print(f"   Newton {t_newton * 1e3:.0f} ms ({r_newton.nit} it, max|Theta| {r_newton.residual_max:.2e}); "
          f"flow {t_flow * 1e3:.0f} ms ({r_flow.nit} it, max|Theta| {r_flow.residual_max:.2e}, status {r_flow.status})")
    print(f"   grid data, target = the truncation floor Newton reached: flow / Newton time {t_flow / t_newton:.1f}")
    for tol in (1e-6, 1e-10):
        exact_settings = FinderSettings(lmax=lmax, tolerance=tol, fallback_to_flow=False)
        t_n, r_n = best_of(lambda: find_surface(pair, guess, settings=exact_settings), 3)
        t_f, r_f = best_of(lambda: find_surface(pair, guess, settings=FinderSettings(
            lmax=lmax, tolerance=tol, method="flow", flow_iterations=5000)), 1)
        print(f"   exact data, tolerance {tol:.0e}: Newton {t_n * 1e3:.0f} ms ({r_n.nit} it, {r_n.residual_max:.1e}), "
              f"flow {t_f * 1e3:.0f} ms ({r_f.nit} it, {r_f.residual_max:.1e}); flow / Newton time {t_f / t_n:.1f}")

    common_pair = BrillLindquist(masses=np.array([1.0, 1.0]), positions=np.array([[0, 0, 0.7], [0, 0, -0.7]]))
    for lmax_common in (12, 16):
        start = Surface.sphere([0, 0, 0], 1.3, lmax_common)
        opts = dict(lmax=lmax_common, tolerance=1e-10, fallback_to_flow=False)
        t_n, r_n = best_of(lambda: find_surface(common_pair, start, settings=FinderSettings(**opts)), 3)
        t_f, r_f = best_of(lambda: find_surface(common_pair, start, settings=FinderSettings(
            **opts, method="flow", flow_iterations=20000)), 1)
        print(f"   exact data, common horizon of an equal pair at d = 1.4 m, l_max {lmax_common}: Newton "
              f"{t_n * 1e3:.0f} ms ({r_n.nit} it), flow {t_f * 1e3:.0f} ms ({r_f.nit} it); flow / Newton time "
              f"{t_f / t_n:.1f}")

    print("\n4. find time against grid size around the same hole (same spacing, larger boxes)")
    hole = BrillLindquist(masses=np.array([1.0]), positions=np.zeros((1, 3)))
    dx = 0.03
    for n in (64, 128, 256):
        t0 = time.perf_counter()
        big = sample_slice(hole, [cube([0, 0, 0], (n - 1) * dx / 2, dx)], variable_set="conformal_w")
        t_sample = time.perf_counter() - t0
        t_find, r = best_of(lambda: find_surface(big, Surface.sphere([0.02, 0, 0], 0.6, 10), settings=FinderSettings(lmax=10)), 3)
        print(f"   {n:3d}^3 nodes ({big.nbytes() / 2**20:7.0f} MiB of fields): find {t_find * 1e3:6.0f} ms "
              f"(status {r.status}); sampling the data took {t_sample:.1f} s")
        del big



def peer_comparison() -> None:
    """Ours against the independent scipy finder on the same arrays: whole find (ours: find +
    measure; peer: spline set-up + solve + area), area error against 16 pi M^2."""
    from peer_spline_finder import PeerFinder, SplineFields

    print("\n5. against an independent scipy finder (cubic B-spline fields + least_squares), Kerr-Schild "
          "Schwarzschild, ADM, 64^3 nodes on [-3M, 3M]^3, l_max 8")
    dx = 6.0 / 63
    sl = sample_slice(SchwarzschildKerrSchild(mass=1.0), [dict(origin=[-3.0] * 3, spacing=[dx] * 3, shape=[64] * 3)],
                      variable_set="adm")
    exact = 16 * np.pi
    guess = Surface.sphere([0.05, 0.0, 0.0], 1.8, 8)

    def ours():
        r = find_surface(sl, guess, settings=settings_of(lmax=8, lmax_cap=8))
        prepared = getattr(r, "geometry", None) or sl  # the find's prepared nodes, where offered
        return r, measure_surface(r.surface, prepared, order=settings_of().interpolation_order).area

    t_ours, (res, area_ours) = best_of(ours, 3)

    def peer():
        fields = SplineFields(sl.patches[0].fields, sl.patches[0].origin, dx)
        finder = PeerFinder(fields, [0.05, 0.0, 0.0], 8)
        a = finder.solve(1.8)
        return finder.area(a)

    t_peer, area_peer = best_of(peer, 1)
    err_ours, err_peer = abs(area_ours / exact - 1), abs(area_peer / exact - 1)
    print(f"   Penumbra (default settings, order {settings_of().interpolation_order}): {t_ours * 1e3:.0f} ms, "
          f"relative area error {err_ours:.2e} (status {res.status})")
    print(f"   scipy peer: {t_peer * 1e3:.0f} ms, relative area error {err_peer:.2e}")
    print(f"   peer time / ours: {t_peer / t_ours:.0f}; our error / peer error: {err_ours / err_peer:.2f}")


def iteration_cost() -> None:
    """One Newton iteration at l_max 12 against one vectorised gather of the same fields at the
    same nodes. The iteration is the finder's own steps (evaluate the iterate, assemble the
    Jacobian, solve, evaluate the trial step) on a prepared geometry, best of many, at the
    solution: the steady state of a find, where the data's nodes are already prepared."""
    from penumbra_server.numerics import finder as finder_module
    from penumbra_server.numerics.sources import as_tracked_source

    print("\n6. one Newton iteration against the gather floor (l_max 12)")
    pair = BrillLindquist(masses=np.array([0.6, 0.4]), positions=np.array([[0.55, 0.1, 0.0], [-0.8, -0.15, 0.0]]))
    centre = pair.positions[0]
    sl = sample_slice(pair, [cube(centre, 0.8, 0.025)], variable_set="conformal_w")
    lmax = 12
    found = find_surface(sl, Surface.sphere(centre + [0.03, 0.0, 0.0], 0.4, lmax),
                         settings=settings_of(lmax=lmax, lmax_cap=lmax)).surface
    source = as_tracked_source(sl, order=settings_of().interpolation_order)
    run = finder_module._Run(source, angular_grid(lmax))

    def one_iteration():
        ev = finder_module._evaluate(run, found)
        J = finder_module._jacobian(run, ev)
        step = np.linalg.solve(J, -run.grid.project(ev.theta))
        return finder_module._evaluate(run, Surface(found.centre, lmax, found.coefficients + step))

    one_iteration()  # prepares the nodes
    guess = found
    order = settings_of().interpolation_order
    patch = sl.patches[0]
    names = list(patch.fields)
    fields = [n for n in names if n not in ("lapse", "shift_x", "shift_y", "shift_z")]
    n_values = 4 * 7 + 7  # conformal factor and 6 metric components with 3 derivatives each, 7 plain
    stack = np.ascontiguousarray(np.stack([patch.fields[fields[k % len(fields)]] for k in range(n_values)], axis=-1))
    rows = stack.reshape(-1, n_values)
    grid = angular_grid(lmax)
    pts = guess.points(guess.on_grid(grid))
    base = np.floor((pts - patch.origin) / patch.spacing).astype(int) - (order // 2 - 1)
    off = np.arange(order)
    i = (base[:, 0, None] + off)[:, :, None, None]
    j = (base[:, 1, None] + off)[:, None, :, None]
    k = (base[:, 2, None] + off)[:, None, None, :]
    flat = np.ravel_multi_index((i, j, k), patch.shape).reshape(len(pts), -1)
    # Interleaved, fastest of many: both see the same moments of a shared machine's load.
    t_gather = per_iteration = float("inf")
    for _ in range(40):
        t_gather = min(t_gather, best_of(lambda: np.take(rows, flat, axis=0), 1)[0])
        per_iteration = min(per_iteration, best_of(one_iteration, 1)[0])
    print(f"   {grid.size} nodes, {order}^3 stencil, {n_values} values per node: gather {t_gather * 1e3:.2f} ms, "
          f"Newton iteration {per_iteration * 1e3:.2f} ms")
    print(f"iteration cost / gather floor: {per_iteration / t_gather:.1f}")


def constant_expansion_cost() -> None:
    """The formation forecast's search (c_min of the enclosing constant-expansion surfaces) just
    before an equal-mass Brill-Lindquist pair's common horizon forms, against the ordinary Newton
    find of that common horizon just after, same grid spacing, same l_max and starting sphere."""
    from penumbra_server.numerics.constant_expansion import ConstantExpansionSettings, smallest_enclosing_expansion

    spacing, lmax, start = 0.04, 10, 0.9
    print(f"\n8. constant-expansion search against an ordinary find (equal pair, bare masses 0.5, dx = {spacing} M, "
          f"l_max {lmax}, starting sphere r = {start} M)")

    def slice_at(d):
        pair = BrillLindquist(masses=np.array([0.5, 0.5]), positions=np.array([[0.5 * d, 0, 0], [-0.5 * d, 0, 0]]))
        return sample_slice(pair, [cube([0.0, 0.0, 0.0], 1.25, spacing)], variable_set="conformal_w")

    before, after = slice_at(0.80), slice_at(0.74)
    t_search, found = best_of(lambda: smallest_enclosing_expansion(
        before, [0.0, 0.0, 0.0], start, settings=ConstantExpansionSettings(lmax=lmax, tolerance=1e-9)), 2)
    t_find, common = best_of(lambda: find_surface(after, Surface.sphere([0.0, 0.0, 0.0], start, lmax),
                                                  settings=FinderSettings(lmax=lmax, tolerance=1e-9)), 2)
    print(f"   search at d = 0.80 M: {t_search * 1e3:.0f} ms, {found.solves} Newton solves, {found.message}")
    print(f"   common-horizon find at d = 0.74 M: {t_find * 1e3:.0f} ms ({common.nit} iterations, status {common.status})")
    print(f"constant-expansion search / common-horizon find: {t_search / t_find:.1f}")


def _scaling_case(points_per_radius: float) -> dict:
    """One resolution of the same hole (isotropic Schwarzschild, horizon r = M/2), in this process."""
    hole = BrillLindquist(masses=np.array([1.0]), positions=np.zeros((1, 3)))
    r_h = 0.5
    dx = r_h / points_per_radius
    sl = sample_slice(hole, [cube([0, 0, 0], 0.6 + 8 * dx, dx)], variable_set="conformal_w")
    guess = Surface.sphere([0.02, 0.0, 0.0], 0.55, 10)
    settings = settings_of(lmax=10, lmax_cap=10)
    find_surface(sl, guess, settings=settings)  # warm caches of harmonic bases
    tracemalloc.start()
    res = find_surface(sl, guess, settings=settings)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    t, res = best_of(lambda: find_surface(sl, guess, settings=settings), 5)
    return dict(time=t, peak_mib=peak / 2**20, status=res.status, nodes=sl.patches[0].shape[0],
                data_mib=sl.nbytes() / 2**20)


def resolution_scaling() -> None:
    """The same hole at r/dx = 12.5 and 50, each in a fresh subprocess (peak memory of the find
    measured by tracemalloc, the slice's own arrays excluded)."""
    print("\n7. the same hole at two resolutions (r = horizon radius)")
    out = {}
    for _ in range(2):  # two alternating rounds, the faster of each: the machine is shared
        for ppr in (12.5, 50.0):
            proc = subprocess.run([sys.executable, __file__, "--scaling-case", str(ppr)], capture_output=True,
                                  text=True, check=True, cwd=Path(__file__).parent)
            case = json.loads(proc.stdout.strip().splitlines()[-1])
            if ppr not in out or case["time"] < out[ppr]["time"]:
                out[ppr] = case
    for ppr in (12.5, 50.0):
        c = out[ppr]
        print(f"   r/dx = {ppr:4.1f}: {c['nodes']}^3 nodes ({c['data_mib']:.0f} MiB of fields), find "
              f"{c['time'] * 1e3:.0f} ms, status {c['status']}, peak {c['peak_mib']:.1f} MiB during the find")
    print(f"find r/dx=50 over r/dx=12.5: {out[50.0]['time'] / out[12.5]['time']:.2f}, peak MiB "
          f"{max(c['peak_mib'] for c in out.values()):.0f}")


if __name__ == "__main__":
    if "--scaling-case" in sys.argv:
        print(json.dumps(_scaling_case(float(sys.argv[sys.argv.index("--scaling-case") + 1]))))
    else:
        main()
