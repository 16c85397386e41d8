"""The MOTS stability operator: analytic eigenvalues on Schwarzschild (derived with sympy here),
slicing independence on stationary horizons, and an independent finite-difference evaluation
of the normal variation of the expansion on distorted surfaces."""

import numpy as np
import pytest
import sympy as sp

from normal_variation import area_density, normal_variation_of_expansion
from penumbra_server.numerics.finder import FinderSettings, find_surface
from penumbra_server.numerics.spacetimes import (
    BoostedSchwarzschildKerrSchild,
    BrillLindquist,
    KerrKerrSchild,
    SchwarzschildIsotropic,
    SchwarzschildKerrSchild,
    sample_slice,
)
from penumbra_server.numerics.stability import principal_eigenvalue, stability_matrices, stability_spectrum
from penumbra_server.numerics.surfaces import Surface, coefficient_count, harmonic_basis


def horizon(data, guess, lmax):
    result = find_surface(data, guess, settings=FinderSettings(lmax=lmax))
    assert result.success, result.message
    return result.surface


def round_horizon_eigenvalue(metric_rr, expansion, r, r_horizon):
    """Principal eigenvalue of a round MOTS: psi = const moves it by proper distance
    dl = sqrt(gamma_rr) dr, so lambda_0 = dTheta/dl there (sympy, exact)."""
    return sp.nsimplify(sp.simplify((sp.diff(expansion, r) / sp.sqrt(metric_rr)).subs(r, r_horizon)))


def isotropic_schwarzschild_eigenvalue(M):
    # gamma = psi^4 (dr^2 + r^2 dOmega^2), psi = 1 + M / 2r, K_ij = 0: Theta = D_i s^i of the
    # coordinate spheres, s^r = psi^-2, D_i s^i = (psi^6 r^2)^-1 d_r (psi^6 r^2 psi^-2).
    r = sp.symbols("r", positive=True)
    psi = 1 + M / (2 * r)
    expansion = sp.diff(psi**4 * r**2, r) / (psi**6 * r**2)
    return round_horizon_eigenvalue(psi**4, expansion, r, M / 2)


def kerr_schild_schwarzschild_eigenvalue(M):
    # gamma_rr = 1 + 2M/r, tangential metric r^2 dOmega^2, K_ij tangential part 2 M alpha / r^2
    # (times delta_ij; Matzner, Huq & Shoemaker, PRD 59, 024015 (1999), components as in the
    # shared references item 2): Theta = 2 / (r sqrt(gamma_rr)) - 2 (2 M alpha / r^2).
    r = sp.symbols("r", positive=True)
    grr = 1 + 2 * M / r
    alpha = 1 / sp.sqrt(grr)
    expansion = 2 / (r * sp.sqrt(grr)) - 4 * M * alpha / r**2
    return round_horizon_eigenvalue(grr, expansion, r, 2 * M)


@pytest.mark.parametrize("M", [1, 2])
def test_isotropic_schwarzschild_spectrum(M):
    lam0 = float(isotropic_schwarzschild_eigenvalue(sp.Integer(M)))
    assert lam0 == pytest.approx(1 / (4 * M * M), rel=1e-14)  # what sympy gives: 1 / (4 M^2)
    centre = np.array([0.3, -0.2, 0.1])
    hole = SchwarzschildIsotropic(mass=M, centre=centre)
    spec = stability_spectrum(horizon(hole, Surface.sphere(centre + 0.05 * M, 0.9 * M, 8), 8), hole)
    assert spec.principal_eigenvalue == pytest.approx(lam0, rel=1e-7)
    assert abs(spec.principal_imaginary) < 1e-12
    # Round horizon of areal radius 2M, Omega = 0, chi = 0: L = -Lap + R_S / 2, so
    # lambda_l = lambda_0 + l (l + 1) / (2M)^2 with multiplicity 2l + 1.
    np.testing.assert_allclose(spec.eigenvalues.real[:6], lam0 + np.array([0, 2, 2, 2, 6, 6]) / (2 * M) ** 2, rtol=1e-7)
    assert spec.symmetrized_eigenvalue == pytest.approx(spec.principal_eigenvalue, rel=1e-9)


def test_kerr_schild_slice_gives_the_same_eigenvalue():
    # Both slices cut the same Killing horizon; on it delta_l Theta = 0 and sigma = 0, so along s
    # L psi = -delta_{psi k} Theta^(l). Between slices l -> f l, k -> k / f with f constant on the
    # round cut, which leaves delta_k Theta^(l) unchanged: expect 1 / (4 M^2) again.
    lam0 = float(kerr_schild_schwarzschild_eigenvalue(sp.Integer(1)))
    assert lam0 == pytest.approx(float(isotropic_schwarzschild_eigenvalue(sp.Integer(1))), rel=1e-14)
    hole = SchwarzschildKerrSchild(mass=1.0, centre=np.zeros(3))
    spec = stability_spectrum(horizon(hole, Surface.sphere([0.1, 0, 0], 2.6, 8), 8), hole)
    assert spec.principal_eigenvalue == pytest.approx(lam0, rel=1e-7)
    np.testing.assert_allclose(spec.eigenvalues.real[:4], [0.25, 0.75, 0.75, 0.75], rtol=1e-7)


def test_boosted_slice_same_spectrum_with_a_non_zero_rotation_one_form():
    # The boosted slice cuts the horizon in a non-round section: l -> f l with f varying over the
    # cut, so Omega -> Omega + D ln f (non-zero here) and L -> f L f^-1: the spectrum is that of
    # the rest frame, 1/4, 3/4 (x3). Omega is exact, so the symmetrized operator shares lambda_0.
    hole = BoostedSchwarzschildKerrSchild(mass=1.0, velocity=np.array([0.0, 0.5, 0.0]), centre=np.zeros(3))
    surface = horizon(hole, Surface.sphere([0, 0, 0], 1.8, 12), 12)
    mats = stability_matrices(surface, hole)
    assert np.max(np.abs(mats.operator - mats.operator.T)) > 1e-3  # not self-adjoint: Omega != 0
    spec = stability_spectrum(surface, hole)
    np.testing.assert_allclose(spec.eigenvalues.real[:4], [0.25, 0.75, 0.75, 0.75], rtol=1e-8)
    assert np.max(np.abs(spec.eigenvalues.imag[:4])) < 1e-8
    assert spec.symmetrized_eigenvalue == pytest.approx(0.25, rel=1e-8)


def test_kerr_principal_eigenvalue_is_real_positive_converged_and_below_the_symmetrized_bound():
    hole = KerrKerrSchild(mass=1.0, spin=0.8, axis=np.array([0.0, 0.0, 1.0]), centre=np.zeros(3))
    surface = horizon(hole, Surface.sphere([0, 0, 0], 2.0, 14), 14)
    coarse, fine = (stability_spectrum(surface, hole, lmax=lm) for lm in (10, 14))
    assert fine.principal_eigenvalue == pytest.approx(coarse.principal_eigenvalue, rel=1e-8)
    assert fine.principal_eigenvalue > 0 and abs(fine.principal_imaginary) < 1e-10
    # Omega has a rotational (co-exact) part on Kerr: the bound is strict (Andersson, Mars &
    # Simon 2008, from memory; the proof is two lines, see the module docstring).
    assert fine.symmetrized_eigenvalue > fine.principal_eigenvalue + 1e-3
    # the principal eigenfunction is positive
    theta, phi = (a.ravel() for a in np.meshgrid(np.linspace(0.01, np.pi - 0.01, 40), np.linspace(0, 2 * np.pi, 40)))
    psi = harmonic_basis(fine.lmax, theta, phi).Y @ fine.eigenfunction
    assert psi.min() > 0


def _distorted(centre, radius, lmax, amplitude, rng):
    c = np.zeros(coefficient_count(lmax))
    c[0] = radius * np.sqrt(4 * np.pi)
    degree = np.concatenate([np.full(2 * k + 1, k) for k in range(lmax + 1)])
    c[1:] = amplitude * radius * rng.normal(size=c.size - 1) / (1 + degree[1:]) ** 3
    return Surface(np.asarray(centre, dtype=float), lmax, c)


@pytest.mark.parametrize(
    "name",
    ["brill-lindquist", "kerr", "boosted"],
)
def test_linearised_expansion_matches_finite_differences_of_moved_surfaces(name):
    # Independent: Theta of surfaces moved by +-eps psi along their normal (numerics/expansion
    # only; no curvature, no stability code), compared in the weak form integral Y_i (.) dA.
    rng = np.random.default_rng(7)
    data, surface = {
        "brill-lindquist": (
            BrillLindquist(masses=[1.0, 0.6], positions=[[0, 0, 0.5], [0.1, 0, -0.5]]),
            _distorted([0, 0, 0.05], 1.3, 6, 0.3, rng),
        ),
        "kerr": (
            KerrKerrSchild(mass=1.0, spin=0.7, axis=np.array([0.3, 0, 1]) / np.hypot(0.3, 1), centre=np.zeros(3)),
            _distorted([0.1, 0, 0], 2.2, 6, 0.3, rng),
        ),
        "boosted": (
            BoostedSchwarzschildKerrSchild(mass=1.0, velocity=[0.3, 0.2, 0], centre=[0, 0, 0]),
            _distorted([0, 0, 0], 2.5, 6, 0.3, rng),
        ),
    }[name]
    lmax = 6
    mats = stability_matrices(surface, data, lmax=lmax)
    assert np.max(np.abs(mats.theta)) > 0.1  # not a MOTS: the Theta term is exercised
    psi = np.zeros(coefficient_count(lmax))
    psi[0] = 1.0
    psi[1:] = 0.3 * rng.normal(size=psi.size - 1) / np.arange(2, psi.size + 1)
    fd = normal_variation_of_expansion(surface, data, psi, mats.theta_nodes, mats.phi_nodes)
    Y = harmonic_basis(lmax, mats.theta_nodes, mats.phi_nodes).Y
    weak_fd = Y.T @ (mats.weights * area_density(surface, data, mats.theta_nodes, mats.phi_nodes) * fd)
    error = np.linalg.norm(mats.linearised_expansion @ psi - weak_fd) / np.linalg.norm(weak_fd)
    assert error < 1e-6, error
    # and the check has teeth: without the Theta (Theta / 2 + K) term it fails by percents
    assert np.linalg.norm(mats.operator @ psi - weak_fd) / np.linalg.norm(weak_fd) > 1e-2


def test_on_grid_data_converges_to_the_analytic_value(cube):
    # 1 / (4 M^2) (derived above) from sampled conformal data; the default curvature step (far
    # below the spacing) is fine because the interpolated first derivatives are continuous.
    hole = SchwarzschildIsotropic(mass=1.0, centre=np.zeros(3))
    errors = []
    for dx in (0.05, 0.025):
        sl = sample_slice(hole, [cube([0, 0, 0], 0.8, dx, offset=0.3)], variable_set="conformal_w")
        surface = horizon(sl, Surface.sphere([0.02, 0, 0], 0.6, 6), 6)
        errors.append(abs(stability_spectrum(surface, sl).principal_eigenvalue - 0.25))
    print("grid eigenvalue errors", errors)
    assert errors[1] < 1e-6 and errors[1] < errors[0] / 4


def test_bad_input_is_named():
    hole = SchwarzschildIsotropic(mass=1.0)
    sphere = Surface.sphere([0, 0, 0], 0.5, 4)
    with pytest.raises(ValueError, match="lmax"):
        stability_matrices(sphere, hole, lmax=0)
    with pytest.raises(ValueError, match="matter_term"):
        stability_matrices(sphere, hole, matter_term=np.zeros(3))
    with pytest.raises(ValueError, match="step"):
        stability_matrices(sphere, hole, curvature_step=0.0)


def test_principal_eigenvalue_of_leading_blocks_equals_a_lower_degree_solve():
    # The harmonics are ordered by degree, so the lower-degree Galerkin problem on the same
    # quadrature is the leading block (a property of the basis ordering, checked here directly).
    hole = KerrKerrSchild(mass=1.0, spin=0.7)
    surface = horizon(hole, Surface.sphere([0.05, 0, 0], 1.75, 8), 8)
    mats = stability_matrices(surface, hole)
    lower = stability_matrices(surface, hole, lmax=6, quadrature_theta=2 * 8 + 6)
    assert principal_eigenvalue(mats, 6) == pytest.approx(stability_spectrum(surface, hole, lmax=6,
                                                                             quadrature_theta=22).principal_eigenvalue, rel=1e-10)
    assert np.allclose(mats.operator[:49, :49], lower.operator, rtol=0, atol=1e-12 * np.abs(mats.operator).max())
    assert principal_eigenvalue(mats) == pytest.approx(stability_spectrum(surface, hole).principal_eigenvalue, rel=1e-10)
    with pytest.raises(ValueError, match="lmax"):
        principal_eigenvalue(mats, 9)
