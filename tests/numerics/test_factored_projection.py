"""The Jacobian's projection factored over the product grid equals the dense quadrature product."""

import numpy as np
import pytest

from penumbra_server.numerics.finder_newton import _jacobian_bases, _project_columns
from penumbra_server.numerics.surfaces import angular_grid


@pytest.mark.parametrize("lmax", [2, 7, 12, 17])
def test_factored_projection_is_the_dense_product(lmax):
    grid = angular_grid(lmax)
    _, projector = _jacobian_bases(grid)  # (weights Y)^T, node by node
    values = np.random.default_rng(lmax).standard_normal((grid.size, 9))
    dense = projector @ values
    np.testing.assert_allclose(_project_columns(grid, values), dense, rtol=0, atol=1e-13 * np.max(np.abs(dense)))
    # A smooth function's projection: Y_00 coefficient of 1 is sqrt(4 pi).
    ones = _project_columns(grid, np.ones((grid.size, 1)))
    assert ones[0, 0] == pytest.approx(np.sqrt(4 * np.pi), rel=1e-13)
    assert np.max(np.abs(ones[1:, 0])) < 1e-13
