"""The finder does not give up early, says why when it stops, and tells the data's interpolation
floor from an unresolved surface; ADM input is as accurate as conformal input; the default
interpolation reaches a cubic spline's accuracy."""

import numpy as np
import pytest

from penumbra_server.numerics import finder as finder_module
from penumbra_server.numerics.finder import FinderSettings, find_surface
from penumbra_server.numerics.geometry import PointGeometry
from penumbra_server.numerics.guesses import NO_TRAPPED_SURFACE_YET, sphere_scan_profile
from penumbra_server.numerics.interpolation import DEFAULT_ORDER
from penumbra_server.numerics.measures import measure_surface, surface_area
from penumbra_server.numerics.resolution import reexpanded
from penumbra_server.numerics.slices import SliceError
from penumbra_server.numerics.spacetimes import (
    BrillLindquist,
    SchwarzschildIsotropic,
    SchwarzschildKerrSchild,
    sample_slice,
)
from penumbra_server.numerics.surfaces import Surface, angular_grid

HOLE = SchwarzschildIsotropic(mass=1.0, centre=np.zeros(3))  # horizon r = M/2, docs/references.md item 1
AREA = 16 * np.pi  # docs/references.md items 1 and 2


def _spoilt_beyond(radius, how):
    """The exact isotropic Schwarzschild geometry, spoilt at points farther than ``radius`` from
    the hole (the horizon at 0.5 stays clean)."""
    calls = {"spoilt": 0}

    def source(points):
        geo = HOLE.geometry(points)
        far = np.linalg.norm(points, axis=1) > radius
        if not far.any():
            return geo
        calls["spoilt"] += 1
        if how == "non-finite":
            raise SliceError("field 'gamma_xx' on patches[0] (level 0): non-finite values at nodes needed")
        gamma, covered = geo.gamma.copy(), geo.covered.copy()
        if how == "non-positive":
            gamma[far] = np.diag([1.0, 1.0, -1.0])
        else:  # outside the data
            covered[far] = False
            gamma[far] = np.nan
        return PointGeometry(gamma, geo.dgamma, geo.K, covered, geo.source_patch)

    return source, calls


@pytest.mark.parametrize("how", ["non-positive", "non-finite", "outside"])
def test_a_failed_trial_step_is_shortened_not_fatal(how):
    # From a sphere of radius 0.2 the first full Newton step reaches r = 0.58 (measured); beyond
    # 0.55 the data are spoilt in three ways. Each is a shortened step, and the find succeeds.
    source, calls = _spoilt_beyond(0.55, how)
    result = find_surface(source, Surface.sphere([0, 0, 0], 0.2, 4), settings=FinderSettings(lmax=4))
    assert calls["spoilt"] >= 1  # the full step did reach the spoilt region
    assert result.success, result.message
    np.testing.assert_allclose(result.surface.on_grid(angular_grid(4)).h, 0.5, atol=1e-9)


@pytest.mark.parametrize("how, status", [("non-positive", finder_module.INVALID_GEOMETRY),
                                         ("non-finite", finder_module.NON_FINITE_DATA),
                                         ("outside", finder_module.OUTSIDE_DATA)])
def test_a_guess_in_spoilt_data_is_a_status_with_a_message(how, status):
    source, _ = _spoilt_beyond(0.55, how)
    result = find_surface(source, Surface.sphere([0, 0, 0], 0.9, 4), settings=FinderSettings(lmax=4))
    assert not result.success and result.status == status
    assert result.message.startswith(finder_module.STATUS_MESSAGES[status])


def test_non_finite_grid_data_is_a_status_not_an_exception(cube):
    sl = sample_slice(HOLE, [cube([0, 0, 0], 0.8, 0.04)], variable_set="conformal_w")
    patch = sl.patches[0]
    fields = dict(patch.fields)
    fields["A_tilde_xy"] = np.full(patch.shape, np.nan)  # nowhere declared excised
    bad = type(sl)(time=0.0, iteration=0, variable_set="conformal_w",
                   patches=(type(patch)(origin=patch.origin, spacing=patch.spacing, shape=patch.shape, level=0,
                                        fields=fields),))
    result = find_surface(bad, Surface.sphere([0, 0, 0], 0.45, 4), settings=FinderSettings(lmax=4))
    assert result.status == finder_module.NON_FINITE_DATA and not result.success
    assert "A_tilde_xy" in result.message


def test_status_table_tells_the_interpolation_floor_from_truncation(cube):
    # Grid data, round hole: what is left is the data's interpolation error (status 10).
    sl = sample_slice(HOLE, [cube([0, 0, 0], 0.8, 0.04)], variable_set="conformal_w")
    on_grid = find_surface(sl, Surface.sphere([0.02, 0, 0], 0.45, 6), settings=FinderSettings(lmax=6))
    assert on_grid.status == finder_module.CONVERGED_AT_INTERPOLATION_FLOOR and on_grid.success
    assert 0 < on_grid.interpolation_floor < 1e-3
    assert on_grid.residual_max_between_nodes <= 3 * on_grid.interpolation_floor
    # Exact data, a peanut-shaped common horizon (equal Brill-Lindquist pair at d = 1.4 < 1.53 m,
    # docs/references.md item 7): no floor, and l_max 4 cannot resolve it.
    pair = BrillLindquist(masses=np.array([1.0, 1.0]), positions=np.array([[0, 0, 0.7], [0, 0, -0.7]]))
    coarse = find_surface(pair, Surface.sphere([0, 0, 0], 1.3, 4), settings=FinderSettings(lmax=4, tolerance=1e-10))
    assert coarse.status == finder_module.UNRESOLVED and not coarse.success
    assert coarse.interpolation_floor == 0.0
    assert "l_max cap" in coarse.message


def test_the_finder_raises_lmax_up_to_the_cap_when_the_surface_is_not_resolved():
    pair = BrillLindquist(masses=np.array([1.0, 1.0]), positions=np.array([[0, 0, 0.7], [0, 0, -0.7]]))
    guess = Surface.sphere([0, 0, 0], 1.3, 8)
    fixed = find_surface(pair, guess, settings=FinderSettings(lmax=8, tolerance=1e-10))
    raised = find_surface(pair, guess, settings=FinderSettings(lmax=8, lmax_cap=16, tolerance=1e-10))
    assert fixed.surface.lmax == 8 and raised.surface.lmax == 16
    assert raised.success
    # Spectral decay of the truncation: measured 4.0e-3 at l_max 8 against 4.1e-5 at 16.
    assert raised.residual_max_between_nodes < fixed.residual_max_between_nodes / 30


def test_the_expansion_centre_moves_to_the_centroid_when_that_helps():
    # The hole sits 0.2 M (0.4 horizon radii) from the guess's centre: about that centre l_max 4
    # cannot hold the round horizon; about the centroid it is a sphere.
    hole = SchwarzschildIsotropic(mass=1.0, centre=np.array([0.2, 0.0, 0.0]))
    result = find_surface(hole, Surface.sphere([0, 0, 0], 0.5, 4), settings=FinderSettings(lmax=4, tolerance=1e-10))
    assert result.recentred and result.status == finder_module.CONVERGED
    np.testing.assert_allclose(result.surface.centre, [0.2, 0, 0], atol=1e-6)
    np.testing.assert_allclose(result.surface.on_grid(angular_grid(4)).h, 0.5, atol=1e-9)


def test_reexpansion_about_a_new_centre_keeps_the_surface():
    # An off-centre sphere written about a point inside it, then back: the points stay on it.
    sphere = Surface.sphere([0.05, 0.0, -0.03], 1.0, 12)
    moved = reexpanded(sphere, [0.0, 0.0, 0.0], 12)
    pts = moved.points(moved.on_grid(angular_grid(12)))
    # A sphere about an off-centre point is not band-limited; l_max 12 holds it to ~1e-9 here.
    np.testing.assert_allclose(np.linalg.norm(pts - sphere.centre, axis=1), 1.0, atol=1e-8)
    assert reexpanded(sphere, [3.0, 0, 0]) is None  # outside the surface


def test_a_scan_without_candidates_says_no_trapped_surface_yet(cube):
    # Spheres about the hole with radii 0.7..0.95 M: all untrapped, all inside the data (usable
    # out to 1.6 M less the stencils' reach, 6 nodes).
    sl = sample_slice(HOLE, [cube([0, 0, 0], 1.6, 0.1)], variable_set="conformal_w")
    quiet = sphere_scan_profile(sl, [0, 0, 0], 0.7, 0.95, samples=8)
    assert not quiet.candidates and quiet.no_trapped_surface_yet
    assert quiet.message.startswith(NO_TRAPPED_SURFACE_YET)
    # Spheres that leave the data are another matter.
    leaving = sphere_scan_profile(sl, [0, 0, 0], 1.7, 2.5, samples=6)
    assert not leaving.candidates and not leaving.no_trapped_surface_yet
    assert "leaves the data" in leaving.message


def test_measuring_with_the_finds_prepared_geometry_changes_nothing(cube):
    sl = sample_slice(HOLE, [cube([0, 0, 0], 0.8, 0.04)], variable_set="conformal_w")
    result = find_surface(sl, Surface.sphere([0.02, 0, 0], 0.45, 6), settings=FinderSettings(lmax=6))
    reused = measure_surface(result.surface, result.geometry)
    fresh = measure_surface(result.surface, sl)
    assert reused.area == pytest.approx(fresh.area, rel=1e-14)
    assert reused.circumference_xy == pytest.approx(fresh.circumference_xy, rel=1e-14)


def test_nodes_are_prepared_only_where_the_surface_reaches(cube):
    # A 101^3 box around the hole: the find touches a shell of nodes, not the volume.
    sl = sample_slice(HOLE, [cube([0, 0, 0], 1.0, 0.02)], variable_set="conformal_w")
    result = find_surface(sl, Surface.sphere([0.02, 0, 0], 0.45, 6), settings=FinderSettings(lmax=6))
    assert result.success
    prepared = result.geometry.grid.prepared_nodes
    total = int(np.prod(sl.patches[0].shape))
    assert prepared < total / 8, (prepared, total)


def test_adm_input_of_a_puncture_is_as_accurate_as_conformal_input():
    # One hole of an equal Brill-Lindquist pair (docs/references.md item 7), bare masses 1/2 (M = 1)
    # at z = +-1.5, dx = M/32. Reference: the exact evaluator at l_max 12.
    pair = BrillLindquist(masses=np.array([0.5, 0.5]), positions=np.array([[0, 0, 1.5], [0, 0, -1.5]]))
    centre = np.array([0.0, 0.0, 1.5])
    exact = find_surface(pair, Surface.sphere(centre, 0.3, 12), settings=FinderSettings(lmax=12, tolerance=1e-12))
    reference = measure_surface(exact.surface, pair).area
    dx = 1 / 32
    box = dict(origin=centre - 0.6 + 0.37 * dx, spacing=[dx] * 3, shape=[int(1.2 / dx) + 2] * 3)
    errors = {}
    for variable_set in ("adm", "conformal_w"):
        sl = sample_slice(pair, [box], variable_set=variable_set)
        found = find_surface(sl, Surface.sphere(centre + [0.01, 0, 0], 0.3, 8), settings=FinderSettings(lmax=8))
        assert found.success, found.message
        errors[variable_set] = abs(measure_surface(found.surface, found.geometry).area / reference - 1)
    print(f"area errors against the exact evaluator: {errors}")
    assert max(errors.values()) <= 2 * min(errors.values()), errors
    assert max(errors.values()) < 1e-5


@pytest.mark.slow
def test_default_settings_reach_a_cubic_spline_finders_accuracy_on_kerr_schild_data():
    # Kerr-Schild Schwarzschild in ADM variables (docs/references.md item 2: area 16 pi M^2) on a
    # 64^3 vertex-centred grid over [-3M, 3M]^3, l_max 8. A tensor-product cubic spline of the
    # fields with fourth-order differences reaches 2.7e-7 here (tests/benchmarks/bench_finder.py,
    # section 5); order 4 Lagrange reached 3.2e-6, the default (order 6) 4.9e-8.
    dx = 6.0 / 63
    sl = sample_slice(SchwarzschildKerrSchild(mass=1.0), [dict(origin=[-3.0] * 3, spacing=[dx] * 3, shape=[64] * 3)],
                      variable_set="adm")
    result = find_surface(sl, Surface.sphere([0.05, 0, 0], 1.8, 8), settings=FinderSettings(lmax=8))
    assert result.success and DEFAULT_ORDER == FinderSettings().interpolation_order
    error = abs(surface_area(result.surface, sl) / AREA - 1)
    print(f"relative area error at the defaults: {error:.2e}")
    assert error <= 2e-7
