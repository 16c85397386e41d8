"""Solver behaviour: the result contract, convergence, the Jacobian, failures as results."""

import dataclasses

import numpy as np
import pytest

from penumbra_server.numerics import finder as finder_module
from penumbra_server.numerics.finder import (
    CONVERGED,
    OUTSIDE_DATA,
    STATUS_MESSAGES,
    FinderSettings,
    FindResult,
    _Run,
    _evaluate,
    _jacobian,
    find_surface,
)
from penumbra_server.numerics.guesses import guess_from_previous, scan_spheres, sphere_scan_profile
from penumbra_server.numerics.measures import measure_surface
from penumbra_server.numerics.sources import as_tracked_source
from penumbra_server.numerics.spacetimes import BrillLindquist, KerrKerrSchild, SchwarzschildIsotropic, sample_slice
from penumbra_server.numerics.surfaces import Surface, angular_grid

SCHWARZSCHILD = SchwarzschildIsotropic(mass=1.0, centre=np.array([0.1, -0.05, 0.02]))


@pytest.mark.parametrize("method", ["newton", "flow"])
def test_every_method_returns_the_documented_fields(method):
    result = find_surface(SCHWARZSCHILD, Surface.sphere([0, 0, 0], 0.8, 6),
                          settings=FinderSettings(lmax=6, method=method))
    names = {f.name for f in dataclasses.fields(FindResult)}
    assert {"surface", "success", "status", "message", "nit", "residual_max_history",
            "residual_rms_history", "geometry_evaluations", "wall_time_s", "method"} <= names
    assert result.success and result.status in finder_module.SUCCESS_STATUSES
    assert result.message.startswith(STATUS_MESSAGES[result.status])
    assert len(result.residual_max_history) == len(result.residual_rms_history) >= 2
    assert result.wall_time_s > 0 and result.method == method
    assert result.surface.lmax == 6


def test_newton_converges_fast_and_costs_two_geometry_evaluations_per_iteration():
    result = find_surface(SCHWARZSCHILD, Surface.sphere([0.1, -0.05, 0.02], 0.9, 6),
                          settings=FinderSettings(lmax=6, tolerance=1e-12))
    assert result.status == CONVERGED
    hist = result.residual_max_history
    assert result.nit <= 7
    # Quadratic convergence: each late step squares the (normalised) residual, roughly.
    assert hist[-1] < 1e-12 and hist[-2] < 1e-4
    # Two per iteration (the iterate and the h-perturbation), plus the guess, the check between
    # nodes and a rare backtracking trial; never one per coefficient ((lmax+1)^2 = 49 here).
    assert 2 * result.nit + 2 <= result.geometry_evaluations <= 2 * result.nit + 4
    assert result.residual_max_between_nodes < 1e-11
    np.testing.assert_allclose(result.surface.on_grid(angular_grid(6)).h, 0.5, atol=1e-11)


def test_flow_takes_many_more_iterations_than_newton():
    guess = Surface.sphere([0.1, -0.05, 0.02], 0.9, 6)
    newton = find_surface(SCHWARZSCHILD, guess, settings=FinderSettings(lmax=6, tolerance=1e-10))
    flow = find_surface(SCHWARZSCHILD, guess, settings=FinderSettings(lmax=6, tolerance=1e-10, method="flow"))
    assert newton.success and flow.success
    assert flow.nit > 4 * newton.nit
    np.testing.assert_allclose(flow.surface.coefficients, newton.surface.coefficients, atol=1e-9)


def test_assembled_jacobian_matches_brute_force_differences():
    kerr = KerrKerrSchild(mass=1.0, spin=0.6, axis=np.array([0.0, 0.6, 0.8]), centre=np.zeros(3))
    lmax = 4
    rng = np.random.default_rng(7)
    surface = Surface.sphere([0.05, 0, 0], 1.9, lmax)
    coeffs = surface.coefficients + np.r_[0.0, 0.03 * rng.normal(size=surface.coefficients.size - 1)]
    surface = Surface(surface.centre, lmax, coeffs)
    grid = angular_grid(lmax)
    run = _Run(as_tracked_source(kerr), grid)
    ev = _evaluate(run, surface)
    J = _jacobian(run, ev)
    brute = np.empty_like(J)
    eps = 1e-6
    for k in range(coeffs.size):
        c = coeffs.copy()
        c[k] += eps
        plus = _evaluate(run, Surface(surface.centre, lmax, c)).theta
        c[k] -= 2 * eps
        minus = _evaluate(run, Surface(surface.centre, lmax, c)).theta
        brute[:, k] = grid.project((plus - minus) / (2 * eps))
    np.testing.assert_allclose(J, brute, atol=2e-6 * np.abs(brute).max())


def test_truncation_hidden_by_the_nodes_is_reported():
    # Equal Brill-Lindquist pair on the z axis: by symmetry the projection pins Theta to zero at
    # every node, but not between them; l_max 8 cannot resolve the peanut to 1e-10.
    bl = BrillLindquist(masses=np.array([1.0, 1.0]), positions=np.array([[0, 0, 0.7], [0, 0, -0.7]]))
    coarse = find_surface(bl, Surface.sphere([0, 0, 0], 1.3, 8), settings=FinderSettings(lmax=8, tolerance=1e-10))
    fine = find_surface(bl, Surface.sphere([0, 0, 0], 1.3, 20), settings=FinderSettings(lmax=20, tolerance=1e-10))
    assert coarse.residual_max < 1e-12 and coarse.residual_max_between_nodes > 1e-4
    assert coarse.status == finder_module.CONVERGED_AT_TRUNCATION and coarse.success
    assert fine.residual_max_between_nodes < coarse.residual_max_between_nodes / 100  # spectral decay


def test_not_converging_is_a_result_not_an_exception():
    # Two bare masses 1 at separation 2.5: no common horizon there (docs/references.md item 7), so a
    # search about the midpoint must fail, cleanly.
    bl = BrillLindquist(masses=np.array([1.0, 1.0]), positions=np.array([[0, 0, 1.25], [0, 0, -1.25]]))
    result = find_surface(bl, Surface.sphere([0, 0, 0], 2.2, 8),
                          settings=FinderSettings(lmax=8, max_iterations=15, flow_iterations=60))
    assert not result.success
    assert result.status in (2, 3, 5)
    assert result.message.startswith(STATUS_MESSAGES[result.status])


def test_leaving_the_data_is_reported_with_where_and_which_patch(cube):
    sl = sample_slice(SCHWARZSCHILD, [cube([0, 0, 0], 0.7, 0.1)], variable_set="conformal_w")
    result = find_surface(sl, Surface.sphere([0, 0, 0], 0.65, 6), settings=FinderSettings(lmax=6))
    assert result.status == OUTSIDE_DATA and not result.success
    assert "patches[0]" in result.message and "theta" in result.message


def test_bad_settings_are_rejected_up_front():
    with pytest.raises(ValueError, match="method"):
        FinderSettings(method="simplex")
    with pytest.raises(ValueError, match="tolerance"):
        FinderSettings(tolerance=0.0)


def test_sphere_scan_brackets_the_horizon_and_inner_surfaces():
    # Isotropic Schwarzschild: mean expansion of centred spheres changes sign only at r = M/2
    # (docs/references.md item 1).
    radii = scan_spheres(SchwarzschildIsotropic(mass=1.0, centre=np.zeros(3)), [0, 0, 0], 0.1, 3.0)
    # mean and barrier coincide for a centred round horizon
    assert len(radii) == 1 and radii[0] == pytest.approx(0.5, abs=1e-6)
    # Brill-Lindquist pair at separation 1.0 m: the mean expansion of spheres about the midpoint
    # stays positive, the barrier candidate still seeds Newton, which converges.
    bl = BrillLindquist(masses=np.array([1.0, 1.0]), positions=np.array([[0, 0, 0.5], [0, 0, -0.5]]))
    profile = sphere_scan_profile(bl, [0, 0, 0], 0.2, 4.0)
    assert profile.candidates and list(profile.candidates) == sorted(profile.candidates, reverse=True)
    result = find_surface(bl, Surface.sphere([0, 0, 0], profile.candidates[0], 10), settings=FinderSettings(lmax=10))
    assert result.success


def test_guess_from_previous_moves_the_shape():
    prev = find_surface(SCHWARZSCHILD, Surface.sphere([0, 0, 0], 0.8, 6), settings=FinderSettings(lmax=6)).surface
    moved_hole = SchwarzschildIsotropic(mass=1.0, centre=np.array([0.4, -0.05, 0.02]))
    guess = guess_from_previous(prev, [0.4, -0.05, 0.02], lmax=8)
    result = find_surface(moved_hole, guess, settings=FinderSettings(lmax=8))
    assert result.success and result.nit <= 4


def test_adm_near_a_puncture_is_found_and_sub_grid_surfaces_are_not_accepted(cube):
    # The physical (ADM) metric near a puncture varies like r^-4; the finder decomposes ADM input
    # into W = psi^-2 and a unit-determinant metric at the nodes before interpolating, so at
    # dx ~ m/6 it finds the horizon as from W data (before that decomposition the projected
    # solve converged to a wrong surface here). A spurious sub-grid "MOTS" that the scan brackets
    # next to the puncture is refused for spanning too few grid points.
    hole = BrillLindquist(masses=np.array([0.6]), positions=np.zeros((1, 3)))
    box = cube([0, 0, 0], 1.26, 0.105)
    adm = sample_slice(hole, [box], variable_set="adm")
    smooth = sample_slice(hole, [box], variable_set="conformal_w")
    settings = FinderSettings(lmax=8)
    from_adm = find_surface(adm, Surface.sphere([0, 0, 0], 0.26, 8), settings=settings)
    right = find_surface(smooth, Surface.sphere([0, 0, 0], 0.29, 8), settings=settings)
    assert right.success and from_adm.success
    assert measure_surface(right.surface, smooth).irreducible_mass == pytest.approx(0.6, rel=2e-3)
    assert measure_surface(from_adm.surface, adm).irreducible_mass == pytest.approx(0.6, rel=2e-3)
    tiny = find_surface(smooth, Surface.sphere([0, 0, 0], 0.072, 8), settings=settings)
    assert not tiny.success and tiny.status in (finder_module.TOO_FEW_POINTS, finder_module.UNRESOLVED)


def test_a_metric_that_is_not_positive_definite_is_a_status():
    def broken(points):
        n = len(points)
        gamma = np.tile(np.diag([1.0, 1.0, -1.0]), (n, 1, 1))  # not a Riemannian metric
        return finder_module.PointGeometry(gamma, np.zeros((n, 3, 3, 3)), np.zeros((n, 3, 3)),
                                           np.ones(n, bool), -np.ones(n, int))

    result = find_surface(broken, Surface.sphere([0, 0, 0], 1.0, 4), settings=FinderSettings(lmax=4))
    assert result.status == finder_module.INVALID_GEOMETRY and not result.success
    assert "surface points" in result.message
