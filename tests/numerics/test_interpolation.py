"""Finite differences on sub-boxes and Lagrange interpolation of patch data."""

import numpy as np
import pytest

from penumbra_server.numerics.interpolation import grid_geometry, lagrange_weights
from penumbra_server.numerics.slices import Patch, Slice, SliceError, VariableSet, required_fields
from penumbra_server.numerics.spacetimes import BrillLindquist, KerrKerrSchild, sample_slice


def polynomial_slice(degree, *, spacing=0.1, shape=(20, 21, 22), origin=(-1.0, -1.1, -0.9), level=0, bump=0.0):
    """ADM slice whose gamma_xx is a polynomial of the given total degree (others: flat, K = 0)."""
    axes = [origin[a] + spacing * np.arange(shape[a]) for a in range(3)]
    X, Y, Z = np.meshgrid(*axes, indexing="ij")
    fields = {name: np.zeros(shape) for name in required_fields("adm")}
    for name in ("gamma_xx", "gamma_yy", "gamma_zz"):
        fields[name] = np.ones(shape)
    fields["gamma_xx"] = 2.0 + bump + 0.3 * X**degree + 0.2 * (Y * Z) ** (degree // 2) - 0.1 * Z**degree
    patch = Patch(origin=np.array(origin), spacing=np.full(3, spacing), shape=shape, level=level, fields=fields)
    return patch


def conformal_polynomial_slice(degree, **kw):
    """conformal_chi slice with chi = 1 and gamma_tilde_xx the polynomial of
    :func:`polynomial_slice` (its other components flat, A_tilde = trace_K = 0). Conformal fields
    are interpolated as given; ADM input is first decomposed at the nodes (chi = det^(-1/3) is
    not a polynomial), so exactness is a property of the conformal path."""
    adm = polynomial_slice(degree, **kw)
    fields = {name: np.zeros(adm.shape) for name in required_fields("conformal_chi")}
    fields["chi"] = np.ones(adm.shape)
    for c in ("xx", "xy", "xz", "yy", "yz", "zz"):
        fields["gamma_tilde_" + c] = adm.fields["gamma_" + c]
    return Patch(origin=adm.origin, spacing=adm.spacing, shape=adm.shape, level=adm.level, fields=fields)


def exact_poly(points, degree):
    x, y, z = points.T
    value = 2.0 + 0.3 * x**degree + 0.2 * (y * z) ** (degree // 2) - 0.1 * z**degree
    k = degree // 2
    grad = np.stack(
        [0.3 * degree * x ** (degree - 1), 0.2 * k * y ** (k - 1) * z**k, 0.2 * k * z ** (k - 1) * y**k - 0.1 * degree * z ** (degree - 1)],
        axis=1,
    )
    return value, grad


def test_lagrange_weights_reproduce_polynomials():
    s = np.linspace(0.9, 2.1, 7)
    for nodes in (2, 4, 6):
        w = lagrange_weights(s, nodes)
        for power in range(nodes):
            np.testing.assert_allclose(w @ (np.arange(nodes) ** power), s**power, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("order", [4, 6, 8])
def test_polynomials_of_the_order_are_reproduced_exactly(order):
    # `order` nodes interpolate degree order-1 exactly and the centred difference of that order
    # differentiates degree `order` exactly; an even degree order-2 (>= 2) is exact for both.
    degree = max(order - 2, 2)
    patch = conformal_polynomial_slice(degree, shape=(30, 31, 32), origin=(-1.5, -1.6, -1.4))
    sl = Slice(time=0.0, iteration=0, variable_set="conformal_chi", patches=(patch,))
    rng = np.random.default_rng(0)
    pts = rng.uniform(-0.4, 0.4, size=(50, 3))
    geo = grid_geometry(sl, pts.min(0), pts.max(0), order=order)(pts)
    value, grad = exact_poly(pts, degree)
    assert geo.covered.all()
    np.testing.assert_allclose(geo.gamma[:, 0, 0], value, atol=1e-12)
    np.testing.assert_allclose(geo.dgamma[:, :, 0, 0], grad, atol=1e-10)
    np.testing.assert_allclose(geo.gamma[:, 1, 1], 1.0, atol=1e-14)


def test_finest_patch_wins_and_uncovered_points_are_flagged():
    coarse = polynomial_slice(2, spacing=0.2, shape=(12, 12, 12), origin=(-1.1, -1.1, -1.1), level=0)
    fine = polynomial_slice(2, spacing=0.05, shape=(17, 17, 17), origin=(-0.4, -0.4, -0.4), level=1, bump=1.0)
    sl = Slice(time=0.0, iteration=0, variable_set="adm", patches=(coarse, fine))
    pts = np.array([[0.0, 0.0, 0.0], [0.3, 0.0, 0.0], [5.0, 0.0, 0.0]])  # 0.3: fine stencil leaves the fine patch
    geo = grid_geometry(sl, [-1.0] * 3, [1.0] * 3, order=4)(pts)
    assert geo.source_patch.tolist() == [1, 0, -1]
    assert geo.covered.tolist() == [True, True, False]
    assert np.isnan(geo.gamma[2]).all()
    # The fine patch carries a marker (+1) in gamma_xx, so "finest wins" is visible in values.
    assert geo.gamma[0, 0, 0] == pytest.approx(3.0, abs=1e-12)
    # (ADM input is interpolated as W and a unit-determinant metric, not as the polynomial itself:
    # off the nodes the polynomial is recovered to interpolation error, not exactly.)
    assert geo.gamma[1, 0, 0] == pytest.approx(2.0 + 0.3 * 0.09, abs=1e-4)


def test_non_finite_data_near_a_surface_is_an_error_naming_the_field():
    patch = polynomial_slice(2)
    bad = dict(patch.fields)
    bad["K_xy"] = bad["K_xy"].copy()
    bad["K_xy"][10, 10, 10] = np.nan
    sl = Slice(time=0.0, iteration=0, variable_set="adm",
               patches=(Patch(origin=patch.origin, spacing=patch.spacing, shape=patch.shape, level=0, fields=bad),))
    node = patch.origin + 10 * patch.spacing
    geo = grid_geometry(sl, node - 0.3, node + 0.3)
    with pytest.raises(SliceError, match="K_xy"):
        geo(node[None, :] + 0.01)
    far = node + np.array([0.0, 0.0, 0.55])  # stencil clear of the bad node: fine
    assert geo(far[None, :]).covered.all()


def test_variable_sets_and_memory_orders_give_the_same_geometry(cube):
    kerr = KerrKerrSchild(mass=1.0, spin=0.5, axis=np.array([0.0, 0.6, 0.8]), centre=np.zeros(3))
    box = cube([0.0, 0.0, 0.0], 2.3, 0.125)
    rng = np.random.default_rng(2)
    pts = rng.normal(size=(40, 3))
    pts = 1.9 * pts / np.linalg.norm(pts, axis=1)[:, None]
    results = {}
    for vs, order in [("adm", "C"), ("adm", "F"), ("conformal_chi", "F"), ("conformal_w", "C"), ("conformal_phi", "C")]:
        sl = sample_slice(kerr, [box], variable_set=vs, memory_order=order)
        results[vs, order] = grid_geometry(sl, [-2.0] * 3, [2.0] * 3, order=4)(pts)
    exact = kerr.geometry(pts)
    for key, geo in results.items():
        # Same data, converted at the points: agreement to interpolation error, not bitwise.
        np.testing.assert_allclose(geo.gamma, exact.gamma, atol=1e-4, err_msg=str(key))
        np.testing.assert_allclose(geo.dgamma, exact.dgamma, atol=5e-4, err_msg=str(key))
        np.testing.assert_allclose(geo.K, exact.K, atol=2e-4, err_msg=str(key))
    np.testing.assert_array_equal(results["adm", "C"].gamma, results["adm", "F"].gamma)


def test_slice_validation_names_the_field():
    patch = polynomial_slice(2)
    fields = dict(patch.fields)
    del fields["K_yz"]
    with pytest.raises(SliceError, match="K_yz"):
        Slice(time=0, iteration=0, variable_set="adm",
              patches=(Patch(origin=patch.origin, spacing=patch.spacing, shape=patch.shape, level=0, fields=fields),))
    with pytest.raises(SliceError, match="spacing"):
        Patch(origin=[0, 0, 0], spacing=[0.1, 0.0, 0.1], shape=(4, 4, 4), level=0, fields={})
    with pytest.raises(SliceError, match="gamma_xx.*shape"):
        Patch(origin=[0, 0, 0], spacing=[0.1] * 3, shape=(4, 4, 4), level=0, fields={"gamma_xx": np.zeros((4, 4, 5))})
    with pytest.raises(SliceError, match="variable_set"):
        VariableSet.parse("bssn")


def test_puncture_inside_the_box_does_not_poison_a_surface_around_it(cube):
    # A node sits exactly on the puncture (infinite chi-free ADM data there); a surface that keeps
    # its stencils away from it is still served.
    bl = BrillLindquist(masses=np.array([1.0]), positions=np.zeros((1, 3)))
    box = cube([0, 0, 0], 1.0, 0.1, offset=0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        sl = sample_slice(bl, [box], variable_set="adm")
    assert not np.isfinite(sl.patches[0].fields["gamma_xx"]).all()
    pts = 0.5 * np.eye(3)
    geo = grid_geometry(sl, [-0.7] * 3, [0.7] * 3, order=4)(pts)
    np.testing.assert_allclose(geo.gamma[:, 0, 0], bl.geometry(pts).gamma[:, 0, 0], rtol=1e-3)


def test_points_between_two_patches_narrower_than_the_stencils_fall_back_to_a_lower_order():
    """Two boxes of one level sharing only nine node planes (as two ranks' boxes with few ghost
    nodes do): an order-6 stencil with its difference stencils does not fit in either box near
    the seam, so those points are served at order 4 instead of being "outside the data". The
    horizon of a lone puncture is still found, with area 16 pi m^2 (docs/references.md item 1)."""
    from penumbra_server.numerics.finder import FinderSettings, find_surface
    from penumbra_server.numerics.measures import measure_surface
    from penumbra_server.numerics.surfaces import Surface

    centre = np.array([0.013, -0.021, 0.017])
    hole = BrillLindquist(masses=(1.0,), positions=(tuple(centre),))
    h = 2.4 / 32
    slabs = [{"origin": (centre[0] - 1.2 + first * h, centre[1] - 1.2, centre[2] - 1.2), "spacing": (h, h, h),
              "shape": (last - first + 1, 33, 33)} for first, last in ((0, 20), (12, 32))]
    data = sample_slice(hole, slabs, variable_set="conformal_chi")
    geometry = grid_geometry(data, order=6)
    seam = np.array([[centre[0] - 1.2 + 16 * h, centre[1], centre[2]]])
    assert np.all(np.isfinite(geometry(seam).gamma))
    result = find_surface(data, Surface.sphere(centre, 0.45, 8), settings=FinderSettings(lmax=8, interpolation_order=6))
    assert result.success, result.message
    assert measure_surface(result.surface, data, order=6).area == pytest.approx(16 * np.pi, rel=1e-4)
