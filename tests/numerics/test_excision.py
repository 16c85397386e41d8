"""Excised regions: the finder never reads data inside them; a step that would is shortened; a
guess that needs them ends with a status of its own, never an exception."""

import numpy as np
import pytest

from penumbra_server.numerics.excision import ExcisedDataError, ExcisedSphere, excised_node_mask, widen_along_axes
from penumbra_server.numerics.finder import NEEDS_EXCISED_DATA, STATUS_MESSAGES, FinderSettings, find_surface
from penumbra_server.numerics.guesses import scan_spheres
from penumbra_server.numerics.interpolation import grid_geometry
from penumbra_server.numerics.measures import measure_surface
from penumbra_server.numerics.slices import Patch, Slice, SliceError
from penumbra_server.numerics.sources import as_tracked_source
from penumbra_server.numerics.spacetimes import SchwarzschildKerrSchild, sample_slice
from penumbra_server.numerics.surfaces import Surface, angular_grid

AREA_SCHWARZSCHILD = 16 * np.pi  # M = 1
EXCISION_RADIUS = 1.5  # the evolution's excised interior, r < 1.5 M (horizon at r = 2 M)


#: These tests are about excision itself: order 4, whose stencils (reach 4 nodes = 0.4 M) keep the
#: horizon at r = 2 M clear of the excised r < 1.5 M. Higher orders fall back to lower ones next
#: to excision (test_higher_orders_fall_back_next_to_excision).
ORDER = 4


@pytest.fixture(scope="module")
def kerr_schild_slices():
    """Kerr-Schild Schwarzschild (M = 1) on one h = 0.1 M box: whole, and with r < 1.5 M filled
    with NaN and declared excised (the sphere on the slice)."""
    from numerics_grids import cube_box

    hole = SchwarzschildKerrSchild(mass=1.0, centre=np.zeros(3))
    whole = sample_slice(hole, [cube_box([0, 0, 0], 2.8, 0.1)], variable_set="adm")
    patch = whole.patches[0]
    x, y, z = np.meshgrid(*patch.node_coordinates(), indexing="ij")
    inside = np.sqrt(x * x + y * y + z * z) < EXCISION_RADIUS
    fields = {name: np.where(inside, np.nan, arr) for name, arr in patch.fields.items()}
    cut = Patch(origin=patch.origin, spacing=patch.spacing, shape=patch.shape, level=0, fields=fields)
    excised = Slice(time=0.0, iteration=0, variable_set="adm", patches=(cut,),
                    excised_spheres=(ExcisedSphere((0.0, 0.0, 0.0), EXCISION_RADIUS, "A"),))
    return whole, excised, int(inside.sum())


def test_horizon_area_with_the_interior_excised_equals_the_whole_data(kerr_schild_slices):
    # Area 16 pi M^2 (Matzner, Huq & Shoemaker, PRD 59, 024015 (1999); docs/references.md item 2),
    # to the grid accuracy the whole data give (same grid and tolerance as the published check
    # in test_published_checks: rel 2e-5).
    whole, excised, nan_nodes = kerr_schild_slices
    assert nan_nodes > 10_000  # the interior really is NaN
    settings = FinderSettings(lmax=6, interpolation_order=ORDER)
    guess = Surface.sphere([0, 0, 0], 2.2, 6)
    reference = find_surface(whole, guess, settings=settings)
    result = find_surface(excised, guess, settings=settings)
    assert reference.success and result.success, result.message
    area = measure_surface(result.surface, excised, order=ORDER).area
    print(f"\nKerr-Schild, r < 1.5 M excised: area / 16 pi = {area / AREA_SCHWARZSCHILD:.9f}, "
          f"{result.nit} iterations (whole data: {reference.nit})")
    assert area == pytest.approx(AREA_SCHWARZSCHILD, rel=2e-5)
    # No stencil of the horizon reaches the excised nodes: the same surface as without excision.
    np.testing.assert_array_equal(result.surface.coefficients, reference.surface.coefficients)
    assert area == measure_surface(reference.surface, whole, order=ORDER).area


@pytest.mark.parametrize("radius", [1.2, 1.7])
def test_a_guess_needing_excised_data_ends_with_the_excision_status(kerr_schild_slices, radius):
    _, excised, _ = kerr_schild_slices
    result = find_surface(excised, Surface.sphere([0, 0, 0], radius, 6), settings=FinderSettings(lmax=6, interpolation_order=ORDER))
    assert not result.success and result.status == NEEDS_EXCISED_DATA
    assert result.message.startswith(STATUS_MESSAGES[NEEDS_EXCISED_DATA])
    assert "excised region of patches[0]" in result.message and result.nit == 0


def test_a_newton_step_into_the_excision_is_shortened_and_the_horizon_still_found(kerr_schild_slices):
    # From r = 2.3 M the full first Newton step lands near r = 1.91 M, whose stencils reach into
    # r < 1.5 M; the step is halved instead, and the solve goes on to the horizon.
    whole, excised, _ = kerr_schild_slices
    nearest = []
    source = as_tracked_source(excised)

    def recorded(points):
        nearest.append(float(np.linalg.norm(points, axis=1).min()))
        return source(points)

    guess = Surface.sphere([0, 0, 0], 2.3, 6)
    result = find_surface(recorded, guess, settings=FinderSettings(lmax=6, fallback_to_flow=False, interpolation_order=ORDER))
    reference = find_surface(whole, guess, settings=FinderSettings(lmax=6, fallback_to_flow=False, interpolation_order=ORDER))
    assert result.success and reference.success, result.message
    assert result.method == "newton"
    assert min(nearest) < 1.95  # a trial step reached towards the excision ...
    # ... and was shortened, not fatal: the second iterate differs from the unrestricted one.
    assert result.residual_max_history[1] != reference.residual_max_history[1]
    assert measure_surface(result.surface, excised, order=ORDER).area == pytest.approx(AREA_SCHWARZSCHILD, rel=2e-5)
    np.testing.assert_allclose(result.surface.coefficients, reference.surface.coefficients, atol=1e-6)


def _kerr_schild_excised_inside(radius):
    """A geometry source: exact Kerr-Schild, raising ExcisedDataError for points within
    ``radius`` of the hole (as the grid source does near excised nodes)."""
    hole = SchwarzschildKerrSchild(mass=1.0, centre=np.zeros(3))
    reached = []

    def source(points):
        r = np.linalg.norm(points, axis=1)
        reached.append(float(r.min()))
        if np.any(r < radius):
            raise ExcisedDataError(f"{int((r < radius).sum())} point(s) inside r = {radius} M")
        return hole.geometry(points)

    return source, reached


@pytest.mark.parametrize("method, guess_radius", [("newton", 3.0), ("flow", 4.0)])
def test_both_methods_shorten_a_step_into_the_excision(method, guess_radius):
    # Unrestricted, Newton from r = 3 M first tries r = 0.5 M and the flow from 4 M first moves
    # to r = 1.9 M; with everything inside r = 1.95 M unusable, both still reach r = 2 M.
    source, reached = _kerr_schild_excised_inside(1.95)
    settings = FinderSettings(lmax=6, method=method, fallback_to_flow=False, interpolation_order=ORDER)
    result = find_surface(source, Surface.sphere([0, 0, 0], guess_radius, 6), settings=settings)
    assert result.success, result.message
    assert min(reached) < 1.95
    h = result.surface.on_grid(angular_grid(6)).h
    np.testing.assert_allclose(h, 2.0, atol=1e-6)


def test_when_shortening_cannot_help_the_solve_ends_with_the_excision_status():
    # Everything inside r = 2.05 M unusable: the horizon itself cannot be evaluated.
    source, _ = _kerr_schild_excised_inside(2.05)
    result = find_surface(source, Surface.sphere([0, 0, 0], 2.6, 6), settings=FinderSettings(lmax=6, interpolation_order=ORDER))
    assert not result.success and result.status == NEEDS_EXCISED_DATA
    assert "inside r = 2.05 M" in result.message
    assert result.surface is not None  # the last usable iterate is kept


def test_the_scan_skips_spheres_needing_excised_data(kerr_schild_slices):
    _, excised, _ = kerr_schild_slices
    radii = scan_spheres(excised, np.zeros(3), 1.0, 2.4, order=ORDER)
    assert radii and abs(radii[0] - 2.0) < 0.05


def test_interpolation_refuses_points_whose_stencils_reach_excised_nodes(kerr_schild_slices):
    _, excised, _ = kerr_schild_slices
    geometry = grid_geometry(excised, np.full(3, -2.4), np.full(3, 2.4), order=ORDER)
    assert geometry(np.array([[2.0, 0.0, 0.0]])).covered.all()
    with pytest.raises(ExcisedDataError, match=r"excised region of patches\[0\]"):
        geometry(np.array([[1.75, 0.0, 0.0]]))  # its derivatives read nodes at r < 1.5 M


def test_non_finite_values_outside_the_declared_region_are_still_an_error(kerr_schild_slices):
    _, excised, _ = kerr_schild_slices
    patch = excised.patches[0]
    fields = dict(patch.fields)
    fields["K_xy"] = fields["K_xy"].copy()
    fields["K_xy"][50, 28, 28] = np.nan  # x = 2.2 M on the x axis: outside r < 1.5 M
    bad = Slice(time=0.0, iteration=0, variable_set="adm", excised_spheres=excised.excised_spheres,
                patches=(Patch(origin=patch.origin, spacing=patch.spacing, shape=patch.shape, level=0,
                               fields=fields),))
    excised.check_finite()  # NaN inside the declared sphere only: accepted
    with pytest.raises(SliceError, match=r"field 'K_xy' on patches\[0\] .*1 non-finite value\(s\), first at node \[50, 28, 28\]"):
        bad.check_finite()


def test_mask_field_and_spheres_mark_nodes_and_widening_is_a_cross():
    shape = (7, 7, 7)
    mask_field = np.zeros(shape)
    mask_field[0, 0, 0] = 1.0
    sphere = ExcisedSphere((3.0, 3.0, 3.0), 1.0)
    mask = excised_node_mask(np.zeros(3), np.ones(3), shape, (sphere,), mask_field)
    assert mask[0, 0, 0] and mask[3, 3, 3] and mask[4, 3, 3] and not mask[4, 4, 3]
    assert int(mask.sum()) == 1 + 7  # the mask node, the sphere's centre and its six neighbours
    assert excised_node_mask(np.zeros(3), np.ones(3), shape) is None
    window = (slice(2, 5), slice(2, 5), slice(3, 4))
    np.testing.assert_array_equal(excised_node_mask(np.zeros(3), np.ones(3), shape, (sphere,), None, window),
                                  mask[window])
    single = np.zeros(shape, bool)
    single[3, 3, 3] = True
    wide = widen_along_axes(single, 2)
    assert int(wide.sum()) == 1 + 6 * 2 and wide[1, 3, 3] and wide[3, 3, 5] and not wide[2, 2, 3]
    with pytest.raises(ValueError, match="radius"):
        ExcisedSphere((0, 0, 0), 0.0)
    with pytest.raises(ValueError, match="centre"):
        ExcisedSphere((0, np.nan, 0), 1.0)


def test_bitant_mirroring_excises_the_image_of_an_off_plane_sphere():
    from penumbra_server.numerics.reflection import mirror_slice_through_z0

    hole = SchwarzschildKerrSchild(mass=1.0, centre=np.array([0.0, 0.0, 0.6]))
    half = sample_slice(hole, [dict(origin=(-1.0, -1.0, 0.0), spacing=[0.25] * 3, shape=(9, 9, 7))], variable_set="adm")
    on_plane = ExcisedSphere((0.0, 0.0, 0.0), 0.3)
    above = ExcisedSphere((0.0, 0.0, 0.6), 0.4, "A")
    full = mirror_slice_through_z0(Slice(time=0.0, iteration=0, variable_set="adm", patches=half.patches,
                                         excised_spheres=(on_plane, above)))
    assert full.excised_spheres == (on_plane, above, ExcisedSphere((0.0, 0.0, -0.6), 0.4, "A"))


def test_higher_orders_fall_back_next_to_excision(kerr_schild_slices):
    # At order 6 the horizon's stencils (reach 6 nodes = 0.6 M) would read r < 1.5 M; the points
    # concerned are served by order 4, and the horizon is found to the same accuracy
    # (docs/references.md item 2: area 16 pi M^2).
    whole, excised, _ = kerr_schild_slices
    geometry = grid_geometry(excised, np.full(3, -2.4), np.full(3, 2.4), order=6)
    near = np.array([[2.0, 0.0, 0.0]])
    np.testing.assert_array_equal(geometry(near).gamma,
                                  grid_geometry(excised, near[0] - 1, near[0] + 1, order=4)(near).gamma)
    with pytest.raises(ExcisedDataError):
        geometry(np.array([[1.75, 0.0, 0.0]]))  # even order 4 reads excised nodes here
    result = find_surface(excised, Surface.sphere([0, 0, 0], 2.2, 6), settings=FinderSettings(lmax=6))
    assert result.success, result.message
    assert measure_surface(result.surface, result.geometry).area == pytest.approx(AREA_SCHWARZSCHILD, rel=2e-5)
