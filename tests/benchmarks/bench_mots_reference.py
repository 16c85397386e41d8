"""Brill-Lindquist reference figures for the merger work: critical separations for mass ratios
1, 2 and 4 (axisymmetric shooting, tests/numerics/axisymmetric_mots.py) and the principal
eigenvalues of the stability operator on the outer and inner common MOTSs near the fold
(found by the project's finder from the shooting solutions).

Run: PYTHONPATH=client:service python tests/benchmarks/bench_mots_reference.py [--quick]
Units: bare masses with total M = m1 + m2 = 1 for the critical separations (the equal-mass
value is also given per single bare mass m, as the literature quotes it); eigenvalues 1/m^2 on
the pair with m1 = m2 = 1.
"""

from __future__ import annotations

import pathlib
import sys
import time

import numpy as np

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parents[1] / "numerics"))

from axisymmetric_mots import Pair, common_mots, critical_separation  # noqa: E402
from axisymmetric_seed import harmonic_fit  # noqa: E402

from penumbra_server.numerics.finder import FinderSettings, find_surface  # noqa: E402
from penumbra_server.numerics.measures import surface_area  # noqa: E402
from penumbra_server.numerics.spacetimes import BrillLindquist  # noqa: E402
from penumbra_server.numerics.stability import stability_spectrum  # noqa: E402

# starting separations (units of M) below each fold, found by the scans in the notes
D_LOW = {1: 0.70, 2: 0.70, 4: 0.62}


def critical_separations(ratios):
    out = {}
    for q in ratios:
        start = time.perf_counter()
        m1, m2 = q / (1 + q), 1 / (1 + q)
        d_c = critical_separation(m1, m2, D_LOW[q])
        out[q] = d_c
        extra = f"  (= {2 * d_c:.5f} m per single bare mass)" if q == 1 else ""
        print(f"q = {q}: d_c = {d_c:.5f} M{extra}   [{time.perf_counter() - start:.0f} s]", flush=True)
    return out


def eigenvalues_near_fold(d_c_per_m, offsets, lmax):
    print(f"\nequal masses m = 1, l_max {lmax}: principal eigenvalue (1/m^2) of the stability operator")
    print("   d/m      delta   branch  area(shoot)   area(finder)  max|Theta| between  lambda_0(finder)  lambda_0(fit)")
    for delta in offsets:
        d = d_c_per_m * (1 - delta)
        pair = BrillLindquist(masses=[1.0, 1.0], positions=[[0, 0, d / 2], [0, 0, -d / 2]])
        for name, mots in common_mots(Pair(1.0, 1.0, d)).items():
            seed = harmonic_fit(mots.curve, mots.z_match, lmax)
            fit = stability_spectrum(seed, pair, lmax=lmax)
            found = find_surface(pair, seed, settings=FinderSettings(lmax=lmax, fallback_to_flow=False))
            if found.success:
                spec = stability_spectrum(found.surface, pair, lmax=lmax)
                area, lam = surface_area(found.surface, pair), spec.principal_eigenvalue
                between = found.residual_max_between_nodes
            else:
                area, lam, between = float("nan"), float("nan"), float("nan")
                print(f"   finder did not converge on the {name} MOTS: {found.message}")
            print(f"  {d:.5f}  {delta:.0e}  {name:6s}  {mots.area:12.6f}  {area:12.6f}  {between:9.2e}  "
                  f"{lam:+.6e}  {fit.principal_eigenvalue:+.6e}", flush=True)


def main():
    quick = "--quick" in sys.argv
    d_c = critical_separations([1] if quick else [1, 2, 4])
    eigenvalues_near_fold(2 * d_c[1], [1e-2, 3e-3] if quick else [1e-2, 3e-3, 1e-3], 16 if quick else 24)


if __name__ == "__main__":
    main()
