"""Real spherical harmonics, nodes and surfaces."""

import numpy as np
import pytest
from scipy.special import sph_harm_y

from penumbra_server.numerics.surfaces import Surface, angular_grid, basis_on_grid, expand_on_grid, harmonic_basis


@pytest.mark.parametrize("lmax", [4, 9])
def test_quadrature_makes_the_basis_orthonormal(lmax):
    grid = angular_grid(lmax)
    Y = grid.basis.Y
    gram = Y.T @ (grid.weights[:, None] * Y)
    np.testing.assert_allclose(gram, np.eye(Y.shape[1]), atol=1e-12)
    assert grid.weights.sum() == pytest.approx(4 * np.pi, rel=1e-14)
    assert np.all((grid.theta > 0) & (grid.theta < np.pi))  # no node on a pole


def test_real_harmonics_match_scipy_complex_ones():
    # Independent reference: scipy.special.sph_harm_y (complex, orthonormal, with the
    # Condon-Shortley phase). Real Y_lm = sqrt(2) (-1)^m Re Y_l^m for m > 0, Im for m < 0.
    rng = np.random.default_rng(3)
    theta, phi = rng.uniform(0.1, 3.0, 20), rng.uniform(0, 2 * np.pi, 20)
    B = harmonic_basis(5, theta, phi)
    for l in range(6):
        for m in range(-l, l + 1):
            ref = sph_harm_y(l, abs(m), theta, phi)
            if m == 0:
                expected = ref.real
            elif m > 0:
                expected = np.sqrt(2) * (-1) ** m * ref.real
            else:
                expected = np.sqrt(2) * (-1) ** m * ref.imag
            # Sign conventions differ only by an overall (-1)^m per column; compare up to it.
            col = B.Y[:, l * l + l + m]
            sign = np.sign(col @ expected)
            np.testing.assert_allclose(sign * col, expected, atol=1e-12)


def test_angular_derivatives_match_finite_differences():
    rng = np.random.default_rng(4)
    theta, phi = rng.uniform(0.3, 2.8, 15), rng.uniform(0, 2 * np.pi, 15)
    d = 1e-5
    B = harmonic_basis(6, theta, phi)
    Bt = [harmonic_basis(6, theta + s * d, phi).Y for s in (-1, 1)]
    Bp = [harmonic_basis(6, theta, phi + s * d).Y for s in (-1, 1)]
    np.testing.assert_allclose(B.d_theta, (Bt[1] - Bt[0]) / (2 * d), atol=1e-8)
    np.testing.assert_allclose(B.d_phi, (Bp[1] - Bp[0]) / (2 * d), atol=1e-8)
    np.testing.assert_allclose(B.d_theta_theta, (Bt[1] - 2 * B.Y + Bt[0]) / d**2, atol=2e-4)
    np.testing.assert_allclose(B.d_phi_phi, (Bp[1] - 2 * B.Y + Bp[0]) / d**2, atol=2e-4)
    Btp = harmonic_basis(6, theta, phi + d).d_theta
    Btm = harmonic_basis(6, theta, phi - d).d_theta
    np.testing.assert_allclose(B.d_theta_phi, (Btp - Btm) / (2 * d), atol=1e-7)


def test_sphere_translation_truncation_and_projection():
    s = Surface.sphere([1.0, 2.0, 3.0], 0.75, 6)
    grid = angular_grid(6)
    rd = s.on_grid(grid)
    np.testing.assert_allclose(rd.h, 0.75)
    np.testing.assert_allclose([rd.h_t, rd.h_p, rd.h_tt, rd.h_pp], 0, atol=1e-14)
    pts = s.points(rd)
    np.testing.assert_allclose(np.linalg.norm(pts - s.centre, axis=1), 0.75)
    moved = s.translated([0, 0, 0])
    np.testing.assert_allclose(moved.coefficients, s.coefficients)
    assert moved.mean_radius == pytest.approx(0.75)
    padded = s.with_lmax(10)
    assert padded.coefficients.size == 121 and padded.mean_radius == pytest.approx(0.75)
    # Projection recovers the coefficients of a band-limited function exactly.
    rng = np.random.default_rng(5)
    c = rng.normal(size=49)
    np.testing.assert_allclose(grid.project(grid.basis.Y @ c), c, atol=1e-12)


def test_radius_along_an_arbitrary_curve():
    # h = r0 + eps * Y_10-like z-term: on the equator theta = pi/2 the l=1, m=0 part vanishes.
    lmax = 3
    c = np.zeros(16)
    c[0] = np.sqrt(4 * np.pi)
    c[2] = 0.1  # (l, m) = (1, 0)
    s = Surface(np.zeros(3), lmax, c)
    phi = np.linspace(0, 2 * np.pi, 50)
    np.testing.assert_allclose(s.radius(np.full(50, np.pi / 2), phi), 1.0, atol=1e-14)
    y10 = np.sqrt(3 / (4 * np.pi))
    assert s.radius([0.2], [0.0])[0] == pytest.approx(1.0 + 0.1 * y10 * np.cos(0.2), rel=1e-13)
    assert s.top_degree_fraction() == 0.0


@pytest.mark.parametrize("lmax, grid_lmax", [(4, 4), (8, 12), (16, 20)])
def test_expansion_on_the_grid_by_factors_equals_the_basis_product(lmax, grid_lmax):
    """expand_on_grid sums over the product grid's 1-D factors; the same numbers (to round-off)
    as the (N, K) basis matrices of basis_on_grid times the coefficients, for one field and for
    several at once."""
    rng = np.random.default_rng(lmax)
    basis = basis_on_grid(lmax, grid_lmax)
    for coefficients in (rng.normal(size=(lmax + 1) ** 2), rng.normal(size=((lmax + 1) ** 2, 6))):
        got = expand_on_grid(lmax, grid_lmax, coefficients)
        for values, name in zip(got, ("Y", "d_theta", "d_phi", "d_theta_theta", "d_theta_phi", "d_phi_phi")):
            expected = getattr(basis, name) @ coefficients
            assert values.shape == expected.shape
            np.testing.assert_allclose(values, expected, rtol=0, atol=1e-13 * np.max(np.abs(expected)), err_msg=name)


def test_displaced_embedding_on_a_product_grid_equals_the_pointwise_one():
    """embedding_on_product_grid (sums over the grid's factors) against embedding_at (harmonics
    evaluated point by point) on a quadrature grid finer than either degree."""
    from penumbra_server.numerics.displaced import (DisplacedSurface, embedding_at, embedding_on_product_grid,
                                                    reference_from_star)

    rng = np.random.default_rng(3)
    c = np.zeros(81)
    c[0], c[1:] = 1.0, 0.02 * rng.normal(size=80)
    surface = DisplacedSurface(reference_from_star(Surface((0.1, 0.0, 0.0), 8, c)), 10, 0.01 * rng.normal(size=121))
    grid = angular_grid(10, 30, 60)
    pointwise, factored = embedding_at(surface, grid.theta, grid.phi), embedding_on_product_grid(surface, grid)
    for name in ("x", "x_t", "x_p", "x_tt", "x_tp", "x_pp"):
        np.testing.assert_allclose(getattr(factored, name), getattr(pointwise, name), rtol=0, atol=1e-13, err_msg=name)
