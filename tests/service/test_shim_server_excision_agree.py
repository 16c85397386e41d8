"""The shim and the server each define the excised sphere and which nodes it excises (the shim
must not import the server): the two definitions must agree, so that a slice the shim lets
through with NaN inside a sphere is one the server accepts, node for node."""

from __future__ import annotations

import numpy as np
import pytest

from penumbra_server.numerics.excision import ExcisedSphere as ServerSphere
from penumbra_server.numerics.excision import excised_node_mask
from penumbra_shim._excision import ExcisedSphere as ShimSphere
from penumbra_shim._excision import excised_nodes


@pytest.mark.parametrize("centre, radius", [((0.0, 0.0, 0.0), 1.5), ((0.31, -0.2, 0.05), 0.4), ((5.0, 5.0, 5.0), 0.1)])
def test_both_sides_excise_the_same_nodes(centre, radius):
    origin, spacing, shape = np.array([-2.0, -1.9, -1.8]), np.array([0.1, 0.12, 0.15]), (41, 33, 25)
    rng = np.random.default_rng(7)
    mask = (rng.random(shape) < 0.02).astype(float)
    shim = excised_nodes(origin, spacing, shape, [ShimSphere(centre, radius)], mask=mask)
    server = excised_node_mask(origin, spacing, shape, [ServerSphere(centre, radius)], mask)
    np.testing.assert_array_equal(shim, server)
    assert shim.any()


@pytest.mark.parametrize("centre, radius", [((0.0, 0.0), 1.0), ((0.0, np.nan, 0.0), 1.0), ((0.0, 0.0, 0.0), 0.0),
                                            ((0.0, 0.0, 0.0), -1.0), ((0.0, 0.0, 0.0), np.inf), ("abc", 1.0)])
def test_both_sides_refuse_the_same_spheres(centre, radius):
    with pytest.raises(ValueError):
        ShimSphere(centre, radius)
    with pytest.raises(ValueError):
        ServerSphere(centre, radius)
