"""Whole stencils' node rows read in memory runs (stencil_rows), the store's growth over several
batches, and the direct reads: the same numbers as the node-by-node path, on Brill-Lindquist
data at a coarse and a fine spacing (12.5 and 50 grid points per horizon radius, as the
resolution benchmark; the fine box covers only a patch of the horizon to stay small)."""

import numpy as np
import pytest
from numpy.lib.stride_tricks import sliding_window_view

from penumbra_server.numerics.interpolation import grid_geometry
from penumbra_server.numerics.node_store import NodeStore
from penumbra_server.numerics.slices import Patch, Slice
from penumbra_server.numerics.spacetimes import BrillLindquist, sample_slice
from penumbra_server.numerics.stencil_rows import boxes

from numerics_grids import cube_box

HOLE = BrillLindquist(masses=np.array([1.0]), positions=np.zeros((1, 3)))
HORIZON = 0.5  # isotropic Schwarzschild, m = 1: horizon at r = m / 2
# (points per horizon radius, half width of the box about the horizon point below)
RESOLUTIONS = [(12.5, 0.4), (50.0, 0.24)]
AROUND = HORIZON * np.array([0.6, 0.48, 0.64])  # a point on the horizon, off the axes


def _slice(points_per_radius, half_width, memory_order="C"):
    spacing = HORIZON / points_per_radius
    return sample_slice(HOLE, [cube_box(AROUND, half_width, spacing)], variable_set="conformal_w",
                        memory_order=memory_order)


def _surface_points(count_per_side=4, step=0.1):
    """Points on the horizon sphere about AROUND, a lattice ``step`` M apart along two tangent
    directions: their stencils overlap at the coarse spacing (shared nodes) and not at the fine
    one (every stencil's nodes new, made in the store itself)."""
    normal = AROUND / HORIZON
    t1 = np.cross(normal, [0.0, 0.0, 1.0])
    t1 /= np.linalg.norm(t1)
    t2 = np.cross(normal, t1)
    offsets = step * (np.arange(count_per_side) - (count_per_side - 1) / 2)
    d = AROUND + offsets[:, None, None] * t1 + offsets[None, :, None] * t2
    d = d.reshape(-1, 3)
    return HORIZON * d / np.linalg.norm(d, axis=1)[:, None]


def _rows_by_stencil_and_by_node(sl, points):
    store, _, flat, _, _, _, corners = grid_geometry(sl, order=6).stencils(points)[0]
    by_stencil, by_node = NodeStore(sl, 0, 6), NodeStore(sl, 0, 6)
    by_stencil._fill_stencils(corners, flat)
    by_node._fill(np.unique(flat))
    return (by_stencil.values[np.take(by_stencil._slot, flat)], by_node.values[np.take(by_node._slot, flat)],
            by_stencil, by_node)


@pytest.mark.parametrize("points_per_radius, half_width", RESOLUTIONS)
def test_stencil_rows_equal_the_node_fill_bitwise(points_per_radius, half_width):
    sl = _slice(points_per_radius, half_width)
    a, b, by_stencil, by_node = _rows_by_stencil_and_by_node(sl, _surface_points())
    assert by_stencil.count == by_node.count  # each node once, shared stencil nodes too
    assert np.isfinite(b).all() and np.abs(b[:, 7:28]).max() > 0.1  # real derivatives
    np.testing.assert_array_equal(a, b)


def test_float32_and_mixed_memory_orders_give_the_node_fill_rows():
    sl = _slice(12.5, 0.4)
    patch = sl.patches[0]
    fields = {}
    for k, (name, values) in enumerate(patch.fields.items()):
        values = values.astype(np.float32) if k % 2 else values
        fields[name] = np.asfortranarray(values) if k % 3 == 0 else values  # some fields F-order
    mixed = Slice(time=0.0, iteration=0, variable_set=sl.variable_set,
                  patches=(Patch(origin=patch.origin, spacing=patch.spacing, shape=patch.shape, level=patch.level,
                                 fields=fields),))
    a, b, _, _ = _rows_by_stencil_and_by_node(mixed, _surface_points())
    np.testing.assert_array_equal(a, b)


def test_the_store_grows_over_batches_and_keeps_its_rows():
    sl = _slice(12.5, 0.8)
    points = _surface_points(count_per_side=10, step=0.12)  # 3 spacings apart: partly shared nodes
    store, _, flat, _, _, _, corners = grid_geometry(sl, order=6).stencils(points)[0]
    whole = NodeStore(sl, 0, 6)
    reference = whole.values[whole.slots(flat, corners)]
    batches = NodeStore(sl, 0, 6)
    arrays = set()
    for part in np.array_split(np.arange(len(points)), 6):
        batches.slots(flat[part], corners[part])
        arrays.add(id(batches.values))
    assert len(arrays) > 1  # grown after the first batch: new arrays, the made rows copied
    assert batches.count == whole.count
    np.testing.assert_array_equal(batches.values[batches.slots(flat, corners)], reference)


@pytest.mark.parametrize("points_per_radius, half_width", RESOLUTIONS)
def test_direct_reads_match_the_prepared_rows(points_per_radius, half_width):
    sl = _slice(points_per_radius, half_width)
    points = _surface_points()
    shift = 1e-7 * points / np.linalg.norm(points, axis=1)[:, None]
    direct_grid, rows_grid = grid_geometry(sl, order=6), grid_geometry(sl, order=6)
    direct, direct_moved = direct_grid.evaluate(points, shift, prepare=False)
    rows, rows_moved = rows_grid.evaluate(points, shift)
    assert rows_grid.prepared_nodes > 0
    for name in ("gamma", "dgamma", "K"):
        a, b = getattr(direct, name), getattr(rows, name)
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-12 * np.max(np.abs(b)))
        da = (getattr(direct_moved(), name) - a) / 1e-7
        db = (getattr(rows_moved(), name) - b) / 1e-7
        np.testing.assert_allclose(da, db, rtol=0, atol=1e-6 * np.max(np.abs(db)))


@pytest.mark.parametrize("memory_order", ["C", "F"])
def test_boxes_read_in_runs_are_the_boxes(memory_order):
    rng = np.random.default_rng(1)
    array = rng.standard_normal((14, 11, 13))
    array = np.asfortranarray(array) if memory_order == "F" else array
    store_flat = array.reshape(-1, order=memory_order)
    strides = np.asarray(array.strides) // array.itemsize
    corners = np.array([[0, 0, 0], [2, 3, 1], [5, 0, 4]])
    for shape in ((8, 4, 4), (4, 8, 4), (4, 4, 8), (4, 4, 4)):
        expected = sliding_window_view(array, shape)[corners[:, 0], corners[:, 1], corners[:, 2]]
        np.testing.assert_array_equal(boxes(store_flat, strides, corners, shape), expected)
