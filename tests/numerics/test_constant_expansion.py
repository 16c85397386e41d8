"""Constant-expansion surfaces and the smallest enclosing expansion c_min.

Independent evaluations: for Schwarzschild in isotropic coordinates the expansion of the
coordinate spheres is derived here with sympy from the metric (not the project's expansion
code); for Brill-Lindquist pairs, c_min must cross zero at the critical separation that the
independent shooting reference (axisymmetric_mots.py) gives, and agree within its error bar
with an independent axisymmetric scipy collocation (axisymmetric_cexp.py).
"""

from __future__ import annotations

import numpy as np
import pytest
import sympy as sp

from penumbra_server.numerics.constant_expansion import (
    ConstantExpansionSettings,
    smallest_enclosing_expansion,
    solve_at_mean_radius,
    solve_constant_expansion,
)
from penumbra_server.numerics.spacetimes import BrillLindquist, SchwarzschildIsotropic
from penumbra_server.numerics.surfaces import Surface

#: Equal-mass Brill-Lindquist critical separation in units of the total bare mass, from the
#: shooting reference tests/numerics/axisymmetric_mots.py (test_mots_reference.py computes it;
#: literature about 1.53 per single bare mass, Cadez 1974, from memory).
EQUAL_MASS_CRITICAL_SEPARATION = 0.76620


def _sphere_expansion(mass: float):
    """Theta(r) of isotropic coordinate spheres, from gamma = psi^4 delta with K_ij = 0:
    s^i = psi^-2 x^i / r, sqrt(gamma) = psi^6, Theta = D_i s^i = psi^-6 r^-2 d/dr (r^2 psi^4)."""
    r = sp.symbols("r", positive=True)
    psi = 1 + sp.Rational(1, 2) * mass / r
    theta = sp.simplify(psi**-6 * r**-2 * sp.diff(r**2 * psi**4, r))
    return r, theta


@pytest.mark.parametrize("target", [0.2, -0.1])
def test_constant_expansion_sphere_matches_the_analytic_expansion(target):
    mass = 1.0
    r, theta = _sphere_expansion(mass)
    # outer branch for positive c (outside the throat r = M/2), inner-ish for negative c
    guess_r = 1.2 if target > 0 else 0.3
    exact_r = float(sp.nsolve(theta - target, r, guess_r))
    spacetime = SchwarzschildIsotropic(mass)
    result = solve_constant_expansion(spacetime, Surface.sphere([0, 0, 0], 0.9 * exact_r, 8), target,
                                      settings=ConstantExpansionSettings(lmax=8))
    assert result.converged, result.message
    h = result.surface.radius(np.linspace(0.1, 3.0, 7), np.linspace(0.0, 6.0, 7))
    assert np.max(np.abs(h - exact_r)) < 1e-7
    assert result.expansion == target


def test_held_mean_radius_gives_the_analytic_expansion():
    r, theta = _sphere_expansion(1.0)
    result = solve_at_mean_radius(SchwarzschildIsotropic(1.0), Surface.sphere([0, 0, 0], 0.8, 8), expansion_guess=0.0)
    assert result.converged, result.message
    assert result.expansion == pytest.approx(float(theta.subs(r, 0.8)), abs=1e-9)


def test_schwarzschild_smallest_expansion_is_the_analytic_minimum():
    mass = 2.0
    r, theta = _sphere_expansion(mass)
    # the minimum of Theta(r) inside the throat (the mirror image of the maximum outside)
    r_min = float(sp.nsolve(sp.diff(theta, r), r, 0.1 * mass))
    c_exact = float(theta.subs(r, r_min))
    assert c_exact == pytest.approx(-2 / (3 * np.sqrt(3) * mass), rel=1e-9)  # cross-check of sympy
    found = smallest_enclosing_expansion(SchwarzschildIsotropic(mass), [0, 0, 0], 6.0,
                                         settings=ConstantExpansionSettings(lmax=6))
    assert found.found, found.message
    assert found.c_min == pytest.approx(c_exact, abs=1e-6)
    assert found.mean_radius == pytest.approx(r_min, abs=2e-3)
    assert found.c_min_error < 1e-5
    assert found.expansions[0] < max(found.expansions)  # it marched over the maximum first


def _pair(d: float) -> BrillLindquist:
    return BrillLindquist([0.5, 0.5], [[0, 0, d / 2], [0, 0, -d / 2]])


def test_brill_lindquist_smallest_expansion_falls_to_zero_at_the_critical_separation():
    settings = ConstantExpansionSettings(lmax=8)
    separations = (1.0, 0.78, 0.755)
    found = [smallest_enclosing_expansion(_pair(d), [0, 0, 0], 2.0, settings=settings) for d in separations]
    assert all(f.found for f in found), [f.message for f in found]
    c = np.array([f.c_min for f in found])
    err = np.array([f.c_min_error for f in found])
    assert c[0] > c[1] > 0 > c[2]  # falls as the pair closes, changes sign through d_crit
    # where c_min crosses zero (linear between the two nearest separations) is the critical
    # separation; the uncertainty carried over from c_min's own error bar, plus the chord
    slope = (c[1] - c[2]) / (separations[1] - separations[2])
    d_zero = separations[2] + (0 - c[2]) / slope
    allowance = (err[1] + err[2]) / slope + 2e-3
    assert abs(d_zero - EQUAL_MASS_CRITICAL_SEPARATION) < allowance, (d_zero, allowance)
    # the c_min surface encloses both punctures: its radius towards each exceeds d / 2
    s = found[1].surface
    assert s.radius(np.array([0.0, np.pi]), np.array([0.0, 0.0])).min() > separations[1] / 2


def test_start_radius_must_be_positive():
    with pytest.raises(ValueError, match="start_radius"):
        smallest_enclosing_expansion(SchwarzschildIsotropic(1.0), [0, 0, 0], -1.0)
    with pytest.raises(ValueError, match="radius_step_fraction"):
        ConstantExpansionSettings(radius_step_fraction=0.7)


@pytest.mark.slow
@pytest.mark.parametrize("separation", [1.0, 0.8])
def test_brill_lindquist_c_min_agrees_with_the_independent_axisymmetric_computation(separation):
    from axisymmetric_cexp import smallest_expansion

    reference = smallest_expansion(0.5, separation, terms=12)  # scipy collocation in the meridian plane
    # the same pair along x (a rotation of the reference's z axis: the harmonics see another shape)
    pair = BrillLindquist([0.5, 0.5], [[separation / 2, 0, 0], [-separation / 2, 0, 0]])
    found = smallest_enclosing_expansion(pair, [0, 0, 0], 1.0, settings=ConstantExpansionSettings(lmax=12))
    assert found.found, found.message
    assert abs(found.c_min - reference) <= found.c_min_error + 1e-6, (found.c_min, reference, found.c_min_error)
