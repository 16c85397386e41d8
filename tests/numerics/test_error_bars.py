"""Error bars of quoted horizon quantities against known answers on grid data.

Kerr (Kerr-Schild, tilted and off-centre, a = 0.5 and 0.9; docs/references.md items 3, 5, 6) and
the two individual horizons of a Brill-Lindquist pair (item 7; reference: the same surface found
and measured on the exact evaluator at l_max 16), each sampled onto a grid at three spacings.
Every quantity that has a true value is a case; the cases not generated are stated beside the
list. The overstatement of a case is stated / max(true error, round-off floor): the floor is the
bar's own (1e-12 times the quantity's scale, numerics/error_bars.py), so a quantity exactly 0 by
construction (J, chi and J_n of a Brill-Lindquist hole, K_ij = 0) counts as exact when its bar is
the floor. The issue's criteria: the bar bounds the true error in >= 95 % of the cases and
overstates it by no more than a factor 30 (asserted in >= 95 % of the cases as well).
"""

from __future__ import annotations

import functools

import numpy as np
import pytest
from scipy.special import ellipe

from numerics_grids import cube_box
from test_spin import kerr_horizon_multipoles

from penumbra_server.numerics.error_bars import Quoted, direction_angle, quote_horizon
from penumbra_server.numerics.finder import FinderSettings, find_surface
from penumbra_server.numerics.spacetimes import BrillLindquist, KerrKerrSchild, sample_slice
from penumbra_server.numerics.surfaces import Surface

AXIS = np.array([-0.35, 0.25, 0.9]) / np.linalg.norm([-0.35, 0.25, 0.9])
CENTRE = np.array([-0.06, 0.13, -0.04])
PAIR = BrillLindquist(masses=np.array([1.0, 0.7]), positions=np.array([[0.03, -0.02, 1.6], [0.0, 0.01, -1.6]]))
KERR_SPACINGS = (0.18, 0.13, 0.09)
BL_SPACINGS = (0.15, 0.1, 0.07)  # times the hole's bare mass
QUANTITIES = ("area", "irreducible_mass", "christodoulou_mass", "angular_momentum", "dimensionless_spin",
              "spin_direction", "centroid", "mass_multipoles", "spin_multipoles",
              "equatorial_circumference", "polar_circumference")


def kerr_truth(a: float) -> dict:
    """Exact Kerr horizon values, M = 1 (items 3, 5, 6; multipoles by the independent quadrature of
    tests/numerics/test_spin.py, item 12, sign of J_n as there)."""
    r_plus = 1 + np.sqrt(1 - a * a)
    mass_n, spin_n = kerr_horizon_multipoles(a)
    s = r_plus**2 + a * a
    return dict(area=8 * np.pi * r_plus, irreducible_mass=np.sqrt(r_plus / 2), christodoulou_mass=1.0,
                angular_momentum=a, dimensionless_spin=a, spin_direction=AXIS, centroid=CENTRE,
                mass_multipoles=mass_n, spin_multipoles=spin_n * np.sign(spin_n[1]),
                equatorial_circumference=4 * np.pi, polar_circumference=4 * np.sqrt(s) * ellipe(a * a / s))


@functools.lru_cache(maxsize=None)
def brill_lindquist_reference(hole: int):
    """The hole's horizon found and quoted on the exact evaluator (no grid) at l_max 16."""
    m = PAIR.masses[hole]
    found = find_surface(PAIR, Surface.sphere(PAIR.positions[hole], 0.5 * m, 16),
                         settings=FinderSettings(lmax=16, tolerance=1e-11))
    assert found.success, found.message
    return quote_horizon(found.surface, PAIR, n_max=8)


def grid_case(kind: str, spacing: float):
    """(quoted on grid data, true values, quantities that are cases)."""
    if kind.startswith("kerr"):
        a = float(kind[4:])
        hole = KerrKerrSchild(mass=1.0, spin=a, axis=AXIS, centre=CENTRE)
        centre, guess_radius, half, truth = CENTRE, 1.9, 3.2, kerr_truth(a)
        names = QUANTITIES
    else:
        index = int(kind[2:])
        m = PAIR.masses[index]
        hole, centre, guess_radius, half = PAIR, PAIR.positions[index], 0.5 * m, 1.3 * m
        spacing *= m
        ref = brill_lindquist_reference(index)
        truth = {name: getattr(ref, name).value for name in QUANTITIES}
        # K_ij = 0: J, chi and J_n are exactly 0. Not generated: the spin direction (a spinless
        # hole has none; its bar is pi).
        truth = dict(truth, angular_momentum=0.0, dimensionless_spin=0.0, spin_multipoles=np.zeros(9))
        names = tuple(n for n in QUANTITIES if n != "spin_direction")
    data = sample_slice(hole, [cube_box(centre, half, spacing)], variable_set="conformal_chi")
    lmax = 12 if kind.startswith("kerr") else 10
    # Found and quoted at the same interpolation order (4, the service's): the bars estimate the
    # errors of a surface found at the order they are quoted for.
    found = find_surface(data, Surface.sphere(centre, guess_radius, lmax),
                         settings=FinderSettings(lmax=lmax, interpolation_order=4))
    assert found.success, found.message
    quoted = quote_horizon(found.surface, data, order=4, n_max=8)
    if not kind.startswith("kerr"):
        ref = brill_lindquist_reference(int(kind[2:]))
        if quoted.spin_direction.value @ ref.spin_direction.value < 0:
            # Spinless: the potential's sign is arbitrary; (-1)^n M_n follows it (killing.py).
            truth = dict(truth, mass_multipoles=truth["mass_multipoles"] * (-1.0) ** np.arange(9))
    return quoted, truth, names


def round_off_floor(name: str, truth: dict) -> float:
    """The bars' round-off floor (numerics/error_bars.py): 1e-12 times the quantity's scale."""
    if name == "area":
        return 1e-12 * truth["area"]
    if name == "angular_momentum":
        return 1e-12 * truth["christodoulou_mass"] ** 2
    if name in ("irreducible_mass", "christodoulou_mass", "centroid", "equatorial_circumference",
                "polar_circumference"):
        return 1e-12 * np.sqrt(truth["area"] / (4 * np.pi))
    return 1e-12


def true_error(name: str, value, truth) -> np.ndarray:
    if name == "spin_direction":
        return np.array([direction_angle(value, truth)])
    if name == "centroid":
        return np.full(3, np.linalg.norm(np.asarray(value) - truth))
    return np.atleast_1d(np.abs(np.asarray(value, dtype=float) - truth))


@pytest.mark.slow
def test_error_bars_cover_the_true_error_and_overstate_it_at_most_thirtyfold():
    cases = []  # (configuration, spacing, quantity, index, stated, true, floor)
    for kind, spacings in (("kerr0.5", KERR_SPACINGS), ("kerr0.9", KERR_SPACINGS),
                           ("bl0", BL_SPACINGS), ("bl1", BL_SPACINGS)):
        for spacing in spacings:
            quoted, truth, names = grid_case(kind, spacing)
            assert quoted.interpolation_check == "re-found at order 6"
            for name in names:
                q = getattr(quoted, name)
                errors = true_error(name, q.value, truth[name])
                stated = np.atleast_1d(q.error) * np.ones_like(errors)
                for i, (s, t) in enumerate(zip(stated, errors)):
                    if name in ("mass_multipoles", "spin_multipoles") and i == 0:
                        continue  # M_0 = 1 and J_0 = 0 by definition
                    cases.append((kind, spacing, name, i, float(s), float(t), round_off_floor(name, truth)))
    stated = np.array([c[4] for c in cases])
    true = np.array([c[5] for c in cases])
    floor = np.array([c[6] for c in cases])
    covered = stated >= true
    overstatement = stated / np.maximum(true, floor)
    modest = overstatement <= 30
    print(f"\ncases {len(cases)}: covered {covered.mean():.3f}, overstated at most 30x {modest.mean():.3f}, "
          f"both {(covered & modest).mean():.3f}; true error at or below the floor: {(true <= floor).sum()}")
    above = true > floor
    print(f"cases with a true error above the floor {above.sum()}: covered {covered[above].mean():.3f}, "
          f"overstated at most 30x {modest[above].mean():.3f}")
    print("overstatement percentiles 5/25/50/75/95/max:",
          np.percentile(overstatement, [5, 25, 50, 75, 95, 100]).round(1))
    for c, ok, fine in zip(cases, covered, modest):
        if not (ok and fine):
            print("  outside:", c[:4], f"stated {c[4]:.2e} true {c[5]:.2e}")
    for group in ("kerr", "bl"):
        mine = np.array([c[0].startswith(group) for c in cases])
        print(f"{group}: {mine.sum()} cases, covered {covered[mine].mean():.3f}, at most 30x {modest[mine].mean():.3f}")
    by_quantity = {}
    for c, ok, fine in zip(cases, covered, modest):
        by_quantity.setdefault(c[2], []).append(ok and fine)
    print("both criteria by quantity:", {k: f"{np.mean(v):.2f} of {len(v)}" for k, v in by_quantity.items()})
    assert covered.mean() >= 0.95
    assert modest.mean() >= 0.95


def test_exact_data_has_no_interpolation_term_and_truncation_shrinks_with_lmax():
    # Exact Kerr evaluator (item 3): only the truncation difference remains; it and the true error
    # fall as l_max grows, and the bar covers the true error.
    a = 0.7
    hole = KerrKerrSchild(mass=1.0, spin=a, axis=AXIS, centre=CENTRE)
    r_plus = 1 + np.sqrt(1 - a * a)
    errors = []
    for lmax in (6, 10):
        found = find_surface(hole, Surface.sphere(CENTRE, 1.9, lmax), settings=FinderSettings(lmax=lmax))
        assert found.success, found.message
        q = quote_horizon(found.surface, hole, n_max=4)
        assert q.check_order is None and q.interpolation_check == "exact data" and q.lower_lmax == lmax - 2
        assert abs(q.area.value - 8 * np.pi * r_plus) <= q.area.error
        assert abs(q.angular_momentum.value - a) <= q.angular_momentum.error
        assert direction_angle(q.spin_direction.value, AXIS) <= q.spin_direction.error
        errors.append(q.area.error)
    assert errors[1] < errors[0] / 10


def test_quoted_values_are_frozen_and_bad_input_is_named():
    hole = KerrKerrSchild(mass=1.0, spin=0.3)
    found = find_surface(hole, Surface.sphere([0, 0, 0], 1.9, 6), settings=FinderSettings(lmax=6))
    q = quote_horizon(found.surface, hole, n_max=4)
    assert isinstance(q.area, Quoted) and q.mass_multipoles.value.shape == (5,) == q.mass_multipoles.error.shape
    with pytest.raises(ValueError):
        q.centroid.value[0] = 1.0
    with pytest.raises(ValueError, match="lower_lmax"):
        quote_horizon(found.surface, hole, lower_lmax=6)
    with pytest.raises(ValueError, match="safety_factor"):
        quote_horizon(found.surface, hole, safety_factor=0.5)
    with pytest.raises(ValueError, match="l_max"):
        quote_horizon(found.surface.with_lmax(2), hole)
    sl = sample_slice(hole, [cube_box([0, 0, 0], 3.0, 0.2)])
    with pytest.raises(ValueError, match="order"):
        quote_horizon(found.surface, sl, order=2)
