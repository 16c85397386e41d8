"""The finder's factored forms over the product grid equal the dense products with the basis
matrices they replace (to round-off), and the exact first variation of Theta in the level-set
derivatives agrees with central differences of Theta itself."""

import numpy as np
import pytest

from penumbra_server.numerics.expansion import (
    expansion_from,
    expansion_variation,
    geometry_terms,
    level_set_derivatives,
)
from penumbra_server.numerics.finder_newton import _jacobian_bases, _nodal_columns
from penumbra_server.numerics.geometry import PointGeometry
from penumbra_server.numerics.surfaces import Surface, angular_grid


def _grids():
    return [angular_grid(lmax) for lmax in (0, 1, 4, 12, 17)] + [angular_grid(6, 9, 20)]


@pytest.mark.parametrize("grid", _grids(), ids=lambda g: f"lmax{g.lmax}-{g.n_theta}x{g.n_phi}")
def test_on_grid_is_the_dense_basis_product(grid):
    coefficients = np.random.default_rng(grid.size).standard_normal((grid.lmax + 1) ** 2)
    surface = Surface(np.zeros(3), grid.lmax, coefficients)
    factored = surface.on_grid(grid)
    dense = surface.derivatives(grid.basis, grid.theta, grid.phi)
    for name in ("h", "h_t", "h_p", "h_tt", "h_tp", "h_pp"):
        expected = getattr(dense, name)
        np.testing.assert_allclose(getattr(factored, name), expected, rtol=0, atol=1e-13 * np.max(np.abs(expected)) + 1e-300)
    np.testing.assert_array_equal(factored.theta, grid.theta)


@pytest.mark.parametrize("grid", _grids(), ids=lambda g: f"lmax{g.lmax}-{g.n_theta}x{g.n_phi}")
def test_projection_is_the_dense_quadrature(grid):
    values = np.random.default_rng(grid.size + 1).standard_normal(grid.size)
    dense = grid.basis.Y.T @ (grid.weights * values)
    np.testing.assert_allclose(grid.project(values), dense, rtol=0, atol=1e-13 * np.max(np.abs(dense)))


@pytest.mark.parametrize("grid", _grids(), ids=lambda g: f"lmax{g.lmax}-{g.n_theta}x{g.n_phi}")
def test_nodal_columns_are_the_dense_sum(grid):
    stacked, _ = _jacobian_bases(grid)
    local = np.random.default_rng(grid.size + 2).standard_normal((grid.size, 6))
    dense = np.einsum("nk,nkc->nc", local, stacked)
    np.testing.assert_allclose(_nodal_columns(grid, local), dense, rtol=0, atol=1e-13 * np.max(np.abs(dense)))


def _curved_geometry(n, rng):
    """A positive-definite metric with derivatives and a K at n points (random, no symmetry of
    any spacetime: the variation must hold for any geometry)."""
    a = 0.2 * rng.standard_normal((n, 3, 3))
    gamma = np.eye(3) + 0.5 * (a + np.swapaxes(a, 1, 2)) + 0.3 * np.einsum("nij,nkj->nik", a, a)
    d = rng.standard_normal((n, 3, 3, 3))
    dgamma = 0.5 * (d + np.swapaxes(d, 2, 3))
    k = rng.standard_normal((n, 3, 3))
    return PointGeometry(gamma, dgamma, 0.5 * (k + np.swapaxes(k, 1, 2)), np.ones(n, bool), np.zeros(n, int))


def test_expansion_variation_matches_central_differences_of_theta():
    rng = np.random.default_rng(7)
    grid = angular_grid(5)
    c = np.zeros(36)
    c[0], c[2], c[6], c[7], c[11] = 1.4, 0.08, 0.05, -0.03, 0.02
    rd = Surface(np.zeros(3), 5, c).on_grid(grid)
    terms = geometry_terms(_curved_geometry(grid.size, rng))
    ls = level_set_derivatives(rd)
    variation = expansion_variation(ls.dF, ls.ddF, terms)
    reused = expansion_variation(ls.dF, ls.ddF, terms, expansion_from(ls.dF, ls.ddF, terms))
    np.testing.assert_allclose(reused.slope, variation.slope, rtol=1e-13, atol=1e-13)
    ddir = rng.standard_normal(ls.dF.shape)
    hdir = rng.standard_normal(ls.ddF.shape)
    exact = np.sum(variation.slope * ddir, axis=1) + np.sum(variation.hessian_weight * hdir, axis=(1, 2))
    eps = 1e-5
    plus = expansion_from(ls.dF + eps * ddir, ls.ddF + eps * hdir, terms).theta
    minus = expansion_from(ls.dF - eps * ddir, ls.ddF - eps * hdir, terms).theta
    np.testing.assert_allclose(exact, (plus - minus) / (2 * eps), rtol=0, atol=1e-7 * np.max(np.abs(exact)))
