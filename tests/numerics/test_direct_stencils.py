"""Points evaluated once (the finder's checks between the nodes) are read straight from the patch
arrays: the same values as the prepared node rows to round-off, and no node is prepared for them."""

import numpy as np
import pytest

from penumbra_server.numerics.interpolation import grid_geometry
from penumbra_server.numerics.slices import SliceError
from penumbra_server.numerics.spacetimes import BrillLindquist, sample_slice

from numerics_grids import cube_box

PAIR = BrillLindquist(masses=np.array([1.0, 0.3]), positions=np.array([[0.0, 0.0, 0.0], [1.3, 0.2, 0.0]]))


def _sparse_points(count=40, radius=0.55, seed=3):
    """Points on a sphere far apart for the spacing used here: their stencils share no node."""
    rng = np.random.default_rng(seed)
    d = rng.standard_normal((count, 3))
    return radius * d / np.linalg.norm(d, axis=1)[:, None] + np.array([0.013, -0.007, 0.004])


def _as_arrays(geo):
    return np.concatenate([geo.gamma.reshape(len(geo.gamma), -1), geo.dgamma.reshape(len(geo.gamma), -1),
                           geo.K.reshape(len(geo.gamma), -1)], axis=1)


@pytest.mark.parametrize("memory_order", ["C", "F"])
@pytest.mark.parametrize("order", [4, 6, 8])
def test_direct_values_match_the_node_rows_and_prepare_nothing(memory_order, order):
    sl = sample_slice(PAIR, [cube_box([0, 0, 0], 0.8, 0.02)], variable_set="conformal_w", memory_order=memory_order)
    points = _sparse_points()
    shift = 1e-7 * points / np.linalg.norm(points, axis=1)[:, None]
    direct_grid = grid_geometry(sl, order=order)
    direct, direct_moved = direct_grid.evaluate(points, shift, prepare=False)
    assert direct_grid.prepared_nodes == 0  # read from the arrays, nothing kept
    rows_grid = grid_geometry(sl, order=order)
    rows, rows_moved = rows_grid.evaluate(points, shift)
    assert rows_grid.prepared_nodes > 0
    assert direct.covered.all() and (direct.source_patch == rows.source_patch).all()
    a, b = _as_arrays(direct), _as_arrays(rows)
    # Round-off: the centred differences are summed in another order (values of order 1,
    # derivatives of order 1 / dx times machine precision).
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-12 * np.max(np.abs(b)))
    # The first-order shift along the normal, as the Jacobian's h column uses it.
    da = (_as_arrays(direct_moved()) - a) / 1e-7
    db = (_as_arrays(rows_moved()) - b) / 1e-7
    np.testing.assert_allclose(da, db, rtol=0, atol=1e-6 * np.max(np.abs(db)))
    assert np.max(np.abs(db)) > 0.1  # the shift does change the fields


def test_points_with_prepared_nodes_use_the_rows_and_dense_stencils_are_prepared():
    sl = sample_slice(PAIR, [cube_box([0, 0, 0], 0.8, 0.02)], variable_set="conformal_w")
    points = _sparse_points()
    grid = grid_geometry(sl, order=6)
    grid(points[:10])  # prepares the nodes of the first ten points
    prepared = grid.prepared_nodes
    once = grid.evaluate(points, prepare=False)[0]
    assert grid.prepared_nodes == prepared  # the other 30 were read directly
    np.testing.assert_allclose(_as_arrays(once), _as_arrays(grid_geometry(sl, order=6)(points)), rtol=0, atol=1e-11)
    # Points 0.1 spacing apart share most of their stencil nodes: preparing them is cheaper.
    dense = np.array([0.3, 0.1, -0.2]) + 0.002 * np.arange(30)[:, None] * np.array([1.0, 0.3, 0.2])
    grid.evaluate(dense, prepare=False)
    assert grid.prepared_nodes > prepared


def test_adm_data_and_excision_keep_the_node_path():
    sl = sample_slice(PAIR, [cube_box([0, 0, 0], 0.8, 0.04)], variable_set="adm")
    grid = grid_geometry(sl, order=6)
    grid.evaluate(_sparse_points(), prepare=False)
    assert grid.prepared_nodes > 0


def test_non_finite_data_is_reported_as_on_the_node_path():
    sl = sample_slice(PAIR, [cube_box([0, 0, 0], 0.8, 0.02)], variable_set="conformal_w")
    points = _sparse_points()
    grid = grid_geometry(sl, order=6)
    store, _, _, _, _, _, corners = grid.stencils(points[:1])[0]
    i, j, k = corners[0] + 2
    sl.patches[0].fields["A_tilde_xy"][i, j, k] = np.nan
    with pytest.raises(SliceError, match="A_tilde_xy"):
        grid.evaluate(points, prepare=False)
