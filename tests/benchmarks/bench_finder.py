"""Finder benchmark: prints figures, asserts nothing (run: make bench).

Everything is measured side by side in one run; the machine is shared, so read ratios, not
absolute seconds. Data: one Brill-Lindquist hole (isotropic Schwarzschild, m = 1) sampled in
the W variable set, and an unequal pair for the shape-rich case.
"""

from __future__ import annotations

import time

import numpy as np

from penumbra_server.numerics.finder import FinderSettings, find_surface
from penumbra_server.numerics.guesses import guess_from_previous
from penumbra_server.numerics.interpolation import grid_geometry
from penumbra_server.numerics.expansion import expansion_at
from penumbra_server.numerics.spacetimes import BrillLindquist, sample_slice
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


def main() -> None:
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


if __name__ == "__main__":
    main()
