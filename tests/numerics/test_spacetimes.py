"""Reference spacetimes: published components, independent derivations, sampling.

Sources (item numbers refer to the project's list of published check values, docs/references.md):
item 1: Schwarzschild, isotropic (Baumgarte & Shapiro, Numerical Relativity, 2010);
item 2: Kerr-Schild Schwarzschild (Matzner, Huq & Shoemaker, PRD 59, 024015 (1999); Cook, Living
Rev. Relativity 3, 5 (2000)); item 2b: Painleve-Gullstrand (Painleve 1921, Gullstrand 1922);
item 3: Kerr in Cartesian Kerr-Schild form (Kerr & Schild 1965; Visser, arXiv:0706.0622 (2007));
item 4: boosted Kerr-Schild hole (Matzner, Huq & Shoemaker 1999); items 7-8: Brill-Lindquist
(Brill & Lindquist, Phys. Rev. 131, 471 (1963)).
"""

from __future__ import annotations

import numpy as np
import pytest
import sympy as sp

from penumbra_server.numerics.slices import Slice, SliceError, VariableSet
from penumbra_server.numerics.spacetimes import (
    BoostedSchwarzschildKerrSchild,
    BrillLindquist,
    KerrKerrSchild,
    SchwarzschildIsotropic,
    SchwarzschildKerrSchild,
    SchwarzschildPainleveGullstrand,
    sample_patch,
    sample_slice,
)

EYE = np.eye(3)


def random_points(rng, count, *, r_min, r_max, centre=(0.0, 0.0, 0.0)):
    """Points at radii uniform in [r_min, r_max] about centre, random directions."""
    directions = rng.normal(size=(count, 3))
    directions /= np.linalg.norm(directions, axis=1)[:, None]
    radii = rng.uniform(r_min, r_max, size=count)
    return np.asarray(centre) + radii[:, None] * directions


def outer(a, b):
    return a[:, :, None] * b[:, None, :]


def level_set_expansion(geometry, dF, ddF):
    """Outgoing expansion Theta = D_i s^i - K + K_ij s^i s^j of the level sets of F at points.

    Written here from the definition (independently of the project's expansion module):
    s^i = gamma^ij F_j / u, u^2 = gamma^ij F_i F_j, D_i s^i = d_i s^i + Gamma^i_ik s^k.
    dF (N,3) and ddF (N,3,3) are the Cartesian first and second derivatives of F.
    """
    gamma, dgamma, K = geometry.gamma, geometry.dgamma, geometry.K
    ginv = np.linalg.inv(gamma)
    dginv = -np.einsum("nia,nkab,nbj->nkij", ginv, dgamma, ginv)  # d_k gamma^ij
    F_up = np.einsum("nij,nj->ni", ginv, dF)
    u = np.sqrt(np.einsum("ni,ni->n", F_up, dF))
    s = F_up / u[:, None]
    # d_k F^i = d_k gamma^ij F_j + gamma^ij F_jk
    dF_up = np.einsum("nkij,nj->nki", dginv, dF) + np.einsum("nij,njk->nki", ginv, ddF)
    du = (np.einsum("nkab,na,nb->nk", dginv, dF, dF) + 2 * np.einsum("na,nak->nk", F_up, ddF)) / (2 * u[:, None])
    div_s = np.einsum("nii->n", dF_up) / u - np.einsum("ni,ni->n", F_up, du) / u**2
    contracted_christoffel = 0.5 * np.einsum("nij,nkij->nk", ginv, dgamma)  # Gamma^i_ik
    div_s += np.einsum("nk,nk->n", contracted_christoffel, s)
    trace_K = np.einsum("nij,nij->n", ginv, K)
    return div_s - trace_K + np.einsum("nij,ni,nj->n", K, s, s)


def sphere_level_set(points, centre):
    d = points - centre
    r = np.linalg.norm(d, axis=1)
    n = d / r[:, None]
    return n, (EYE - outer(n, n)) / r[:, None, None]


def quadric_surface(rng, count, B, centre):
    """Points on x^T B x = 1 about centre and the derivatives of F = x^T B x - 1 there."""
    d = rng.normal(size=(count, 3))
    d /= np.sqrt(np.einsum("ni,ij,nj->n", d, B, d))[:, None]
    points = centre + d
    dF = 2 * d @ B
    ddF = np.broadcast_to(2 * B, (count, 3, 3))
    return points, dF, ddF


def rotation_taking_z_to(n):
    """Rodrigues rotation Q with Q e_z = n (a frame choice independent of the module's)."""
    n = np.asarray(n, float) / np.linalg.norm(n)
    z = np.array([0.0, 0.0, 1.0])
    k = np.cross(z, n)
    sin, cos = np.linalg.norm(k), z @ n
    k /= sin
    cross = np.array([[0, -k[2], k[1]], [k[2], 0, -k[0]], [-k[1], k[0], 0]])
    return EYE + sin * cross + (1 - cos) * cross @ cross


# ---------------------------------------------------------------------------------------------
# Published components


def test_kerr_schild_schwarzschild_matches_published_components():
    # docs/references.md item 2: Matzner, Huq & Shoemaker, PRD 59, 024015 (1999); Cook, Living Rev.
    # Relativity 3, 5 (2000): gamma, lapse, shift, K_ij and K in closed form.
    rng = np.random.default_rng(1)
    mass, centre = 1.3, np.array([0.4, -1.1, 2.0])
    points = random_points(rng, 200, r_min=0.3, r_max=20.0, centre=centre)
    spacetime = SchwarzschildKerrSchild(mass, centre)
    geometry = spacetime.geometry(points)
    fields = spacetime.adm_fields(points)

    d = points - centre
    r = np.linalg.norm(d, axis=1)
    n = d / r[:, None]
    nn = outer(n, n)
    alpha = (1 + 2 * mass / r) ** -0.5
    gamma = EYE + (2 * mass / r)[:, None, None] * nn
    shift = (2 * mass / (r + 2 * mass))[:, None] * n
    K = (2 * mass * alpha / r**2)[:, None, None] * (EYE - (2 + mass / r)[:, None, None] * nn)
    trace_K = 2 * mass * alpha**3 / r**2 * (1 + 3 * mass / r)
    # d_k gamma_ij of gamma above, differentiated by hand (common practice).
    dgamma = 2 * mass * (
        np.einsum("ki,nj->nkij", EYE, d) + np.einsum("kj,ni->nkij", EYE, d)
    ) / r[:, None, None, None] ** 3 - 6 * mass * np.einsum("nk,ni,nj->nkij", d, d, d) / r[:, None, None, None] ** 5

    np.testing.assert_allclose(geometry.gamma, gamma, rtol=1e-14, atol=1e-14)
    np.testing.assert_allclose(geometry.dgamma, dgamma, rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(geometry.K, K, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(np.einsum("nij,nij->n", np.linalg.inv(geometry.gamma), geometry.K), trace_K, rtol=1e-12)
    np.testing.assert_allclose(fields["lapse"], alpha, rtol=1e-14)
    np.testing.assert_allclose(np.stack([fields[f"shift_{c}"] for c in "xyz"], axis=1), shift, rtol=1e-13, atol=1e-15)
    assert geometry.covered.all() and (geometry.source_patch == -1).all()
    assert fields["K_xy"] == pytest.approx(geometry.K[:, 0, 1], rel=1e-15)


def test_kerr_schild_sphere_expansion_vanishes_at_2m():
    # docs/references.md item 2 (Matzner, Huq & Shoemaker 1999; Cook 2000):
    # Theta(r) = (2 alpha / r)(1 - 2M/r) for the spheres r = const.
    rng = np.random.default_rng(2)
    mass, centre = 0.8, np.array([1.0, 2.0, -0.5])
    for radius in (1.0, 2 * mass, 4.0):
        points = random_points(rng, 40, r_min=radius, r_max=radius, centre=centre)
        dF, ddF = sphere_level_set(points, centre)
        theta = level_set_expansion(SchwarzschildKerrSchild(mass, centre).geometry(points), dF, ddF)
        alpha = (1 + 2 * mass / radius) ** -0.5
        np.testing.assert_allclose(theta, 2 * alpha / radius * (1 - 2 * mass / radius), atol=1e-13)


def test_painleve_gullstrand_matches_published_components_and_expansion():
    # docs/references.md item 2b (Painleve 1921, Gullstrand 1922): flat gamma, lapse 1,
    # beta^i = sqrt(2M/r) n^i, K_ij = (sqrt(2M/r)/r)[delta_ij - (3/2) n_i n_j],
    # Theta(r) = (2/r)(1 - sqrt(2M/r)), zero at r = 2M.
    rng = np.random.default_rng(3)
    mass, centre = 1.0, np.array([-0.3, 0.2, 0.9])
    spacetime = SchwarzschildPainleveGullstrand(mass, centre)
    points = random_points(rng, 200, r_min=0.2, r_max=30.0, centre=centre)
    geometry = spacetime.geometry(points)
    fields = spacetime.adm_fields(points)
    d = points - centre
    r = np.linalg.norm(d, axis=1)
    n = d / r[:, None]
    q = np.sqrt(2 * mass / r)
    np.testing.assert_allclose(geometry.K, (q / r)[:, None, None] * (EYE - 1.5 * outer(n, n)), rtol=1e-12, atol=1e-15)
    np.testing.assert_array_equal(geometry.gamma, np.broadcast_to(EYE, geometry.gamma.shape))
    np.testing.assert_array_equal(geometry.dgamma, 0.0)
    np.testing.assert_array_equal(fields["lapse"], 1.0)
    np.testing.assert_allclose(np.stack([fields[f"shift_{c}"] for c in "xyz"], axis=1), q[:, None] * n, rtol=1e-14)

    for radius in (1.0, 2 * mass, 5.0):
        sphere = random_points(rng, 30, r_min=radius, r_max=radius, centre=centre)
        dF, ddF = sphere_level_set(sphere, centre)
        theta = level_set_expansion(spacetime.geometry(sphere), dF, ddF)
        np.testing.assert_allclose(theta, 2 / radius * (1 - np.sqrt(2 * mass / radius)), atol=1e-13)


def test_isotropic_schwarzschild_horizon_at_half_mass():
    # docs/references.md item 1 (Baumgarte & Shapiro 2010): psi = 1 + M/(2r), K_ij = 0, apparent
    # horizon at r = M/2; the static lapse (1 - M/2r)/(1 + M/2r) vanishes there.
    rng = np.random.default_rng(4)
    mass, centre = 2.0, np.array([0.5, 0.5, -1.0])
    spacetime = SchwarzschildIsotropic(mass, centre)
    points = random_points(rng, 50, r_min=0.1, r_max=10.0, centre=centre)
    r = np.linalg.norm(points - centre, axis=1)
    psi = 1 + mass / (2 * r)
    geometry = spacetime.geometry(points)
    np.testing.assert_allclose(geometry.gamma, psi[:, None, None] ** 4 * EYE, rtol=1e-14)
    np.testing.assert_array_equal(geometry.K, 0.0)
    np.testing.assert_allclose(spacetime.adm_fields(points)["lapse"], (1 - mass / (2 * r)) / (1 + mass / (2 * r)), rtol=1e-13)
    np.testing.assert_allclose(spacetime.conformal_factor(points), psi, rtol=1e-15)

    horizon = random_points(rng, 30, r_min=mass / 2, r_max=mass / 2, centre=centre)
    dF, ddF = sphere_level_set(horizon, centre)
    np.testing.assert_allclose(level_set_expansion(spacetime.geometry(horizon), dF, ddF), 0.0, atol=1e-13)
    outside = random_points(rng, 10, r_min=mass, r_max=mass, centre=centre)
    assert np.all(level_set_expansion(spacetime.geometry(outside), *sphere_level_set(outside, centre)) > 0)


# ---------------------------------------------------------------------------------------------
# Kerr


def _symbolic_kerr_kerr_schild(spin, mass):
    """Numeric callable (x, y, z) -> (g_mu_nu (4,4), d_k g_mu_nu (3,4,4)) from the Kerr metric
    in Cartesian Kerr-Schild form, differentiated symbolically (docs/references.md item 3)."""
    x, y, z = sp.symbols("x y z", real=True)
    a, m = sp.nsimplify(spin), sp.nsimplify(mass)
    rho2 = x**2 + y**2 + z**2
    # Closed-form root of (x^2 + y^2)/(r^2 + a^2) + z^2/r^2 = 1 (the larger root in r^2).
    r2 = (rho2 - a**2 + sp.sqrt((rho2 - a**2) ** 2 + 4 * a**2 * z**2)) / 2
    r = sp.sqrt(r2)
    f = 2 * m * r**3 / (r**4 + a**2 * z**2)
    l_cov = [sp.Integer(1), (r * x + a * y) / (r**2 + a**2), (r * y - a * x) / (r**2 + a**2), z / r]
    eta = sp.diag(-1, 1, 1, 1)
    pairs = [(mu, nu) for mu in range(4) for nu in range(mu, 4)]
    components = [eta[mu, nu] + f * l_cov[mu] * l_cov[nu] for mu, nu in pairs]
    derivatives = [sp.diff(c, v) for v in (x, y, z) for c in components]
    quartic = (x**2 + y**2) / (r2 + a**2) + z**2 / r2 - 1
    evaluate = sp.lambdify((x, y, z), components + derivatives + [quartic], modules="numpy", cse=True)

    def at(point):
        values = evaluate(*point)
        g, dg = np.empty((4, 4)), np.empty((3, 4, 4))
        for index, (mu, nu) in enumerate(pairs):
            g[mu, nu] = g[nu, mu] = values[index]
            for k in range(3):
                dg[k, mu, nu] = dg[k, nu, mu] = values[(k + 1) * len(pairs) + index]
        return g, dg, values[-1]

    return at


def test_kerr_extrinsic_curvature_matches_sympy_derivation():
    # docs/references.md item 3 (Kerr & Schild 1965; Visser, arXiv:0706.0622 (2007)). Independent
    # route: symbolic derivatives of g_mu_nu, then K_ij = -alpha 4Gamma^t_ij (the sign with
    # K = -nabla_mu n^mu), alpha = (-g^tt)^(-1/2), the metric being independent of t.
    mass, spin = 1.0, 0.6
    kerr = _symbolic_kerr_kerr_schild(spin, mass)
    points = np.array([[1.1, -0.8, 0.7], [2.3, 0.4, -1.9], [-0.5, 1.7, 0.35], [0.9, 0.6, -0.2], [-3.0, -2.0, 4.0]])
    geometry = KerrKerrSchild(mass, spin).geometry(points)
    fields = KerrKerrSchild(mass, spin).adm_fields(points)
    for index, point in enumerate(points):
        g, dg, quartic = kerr(point)
        assert abs(quartic) < 1e-13  # the closed-form r solves the defining quartic
        ginv = np.linalg.inv(g)
        alpha = 1 / np.sqrt(-ginv[0, 0])
        dg4 = np.concatenate([np.zeros((1, 4, 4)), dg])  # d_t g = 0
        christoffel_first = 0.5 * (dg4.transpose(1, 0, 2) + dg4.transpose(1, 2, 0) - dg4)  # [l, mu, nu]
        gamma_t = np.einsum("l,lij->ij", ginv[0], christoffel_first)[1:, 1:]
        K = -alpha * gamma_t
        np.testing.assert_allclose(geometry.K[index], K, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(geometry.gamma[index], g[1:, 1:], rtol=1e-13)
        np.testing.assert_allclose(geometry.dgamma[index], dg[:, 1:, 1:], rtol=1e-10, atol=1e-12)
        assert fields["lapse"][index] == pytest.approx(alpha, rel=1e-13)
        shift = ginv[0, 1:] / -ginv[0, 0]  # g^ti = beta^i / alpha^2, g^tt = -1 / alpha^2
        np.testing.assert_allclose([fields[f"shift_{c}"][index] for c in "xyz"], shift, rtol=1e-12, atol=1e-14)


def test_kerr_with_rotated_axis_is_the_rotated_tensor_field():
    # Tensor transformation (common practice): with x = c + Q X and Q e_z = n,
    # gamma_n(x) = Q gamma_z(X) Q^T, likewise K; d_k gamma picks up a third Q; shift is a vector.
    rng = np.random.default_rng(5)
    mass, spin, axis, centre = 1.0, 0.7, np.array([1.0, -2.0, 2.0]) / 3.0, np.array([0.3, -0.2, 1.5])
    Q = rotation_taking_z_to(axis)
    body = random_points(rng, 100, r_min=0.8, r_max=12.0)
    world = centre + body @ Q.T
    along_z = KerrKerrSchild(mass, spin)
    along_n = KerrKerrSchild(mass, spin, axis=axis * 4.0, centre=centre)  # axis normalised
    gz, gn = along_z.geometry(body), along_n.geometry(world)
    np.testing.assert_allclose(gn.gamma, np.einsum("ia,nab,jb->nij", Q, gz.gamma, Q), rtol=1e-13, atol=1e-14)
    np.testing.assert_allclose(gn.K, np.einsum("ia,nab,jb->nij", Q, gz.K, Q), rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(gn.dgamma, np.einsum("kc,ia,jb,ncab->nkij", Q, Q, Q, gz.dgamma), rtol=1e-12, atol=1e-14)
    fz, fn = along_z.adm_fields(body), along_n.adm_fields(world)
    np.testing.assert_allclose(fn["lapse"], fz["lapse"], rtol=1e-14)
    shift_z = np.stack([fz[f"shift_{c}"] for c in "xyz"], axis=1)
    np.testing.assert_allclose(np.stack([fn[f"shift_{c}"] for c in "xyz"], axis=1), shift_z @ Q.T, rtol=1e-12, atol=1e-14)
    # The data do rotate (not a symmetric case): K differs from the unrotated field.
    assert np.abs(gn.K - along_z.geometry(world - centre).K).max() > 1e-3

    # Spin a along -n is spin -a along n.
    flipped = KerrKerrSchild(mass, -spin, axis=-axis, centre=centre).geometry(world)
    np.testing.assert_allclose(flipped.K, gn.K, rtol=1e-12, atol=1e-14)


def test_kerr_reduces_to_schwarzschild_at_zero_spin():
    rng = np.random.default_rng(6)
    points = random_points(rng, 50, r_min=0.5, r_max=8.0)
    kerr = KerrKerrSchild(1.0, 0.0, axis=(0.2, 0.3, 0.9)).geometry(points)
    schwarzschild = SchwarzschildKerrSchild(1.0).geometry(points)
    np.testing.assert_allclose(kerr.gamma, schwarzschild.gamma, rtol=1e-14, atol=1e-15)
    np.testing.assert_allclose(kerr.K, schwarzschild.K, rtol=1e-13, atol=1e-15)


@pytest.mark.parametrize("spin", [0.5, 0.9])
def test_kerr_horizon_surface_has_zero_expansion(spin):
    # docs/references.md item 3 (Kerr & Schild 1965; Visser 2007): horizon at r = r_+ =
    # M + sqrt(M^2 - a^2), i.e. the spheroid (x^2 + y^2)/(r_+^2 + a^2) + z^2/r_+^2 = 1 in the
    # body frame; a cross-section of the Killing horizon, so Theta = 0 on it.
    rng = np.random.default_rng(7)
    mass, axis, centre = 1.0, np.array([0.0, 0.6, 0.8]), np.array([1.0, 0.0, -2.0])
    spacetime = KerrKerrSchild(mass, spin, axis=axis, centre=centre)
    r_plus = spacetime.horizon_radius
    assert r_plus == pytest.approx(mass + np.sqrt(mass**2 - spin**2), rel=1e-15)
    Q = rotation_taking_z_to(axis)
    # Surfaces r = const: untrapped outside r_+, trapped between r_- and r_+.
    for radius, sign in ((r_plus, 0), (1.3 * r_plus, 1), (0.9 * r_plus, -1)):
        B_body = np.diag([1 / (radius**2 + spin**2), 1 / (radius**2 + spin**2), 1 / radius**2])
        B = Q @ B_body @ Q.T
        points, dF, ddF = quadric_surface(rng, 60, B, centre)
        theta = level_set_expansion(spacetime.geometry(points), dF, ddF)
        if sign == 0:
            np.testing.assert_allclose(theta, 0.0, atol=1e-12)
        else:
            assert np.all(np.sign(theta) == sign)


def sphere_integral(geometry_source, centre, radius, integrand, *, n_theta=32, n_phi=64):
    """Integral over the coordinate sphere |x - centre| = radius of integrand(geometry, points,
    s^i) dA, with the proper area element and unit normal s^i; Gauss-Legendre in cos(theta)."""
    mu, weights = np.polynomial.legendre.leggauss(n_theta)
    theta = np.arccos(mu)
    phi = 2 * np.pi * np.arange(n_phi) / n_phi
    T, P = np.meshgrid(theta, phi, indexing="ij")
    radial = np.stack([np.sin(T) * np.cos(P), np.sin(T) * np.sin(P), np.cos(T)], axis=-1).reshape(-1, 3)
    e_theta = radius * np.stack([np.cos(T) * np.cos(P), np.cos(T) * np.sin(P), -np.sin(T)], axis=-1).reshape(-1, 3)
    e_phi = radius * np.stack([-np.sin(T) * np.sin(P), np.sin(T) * np.cos(P), 0 * T], axis=-1).reshape(-1, 3)
    points = centre + radius * radial
    geometry = geometry_source(points)
    q = lambda a, b: np.einsum("ni,nij,nj->n", a, geometry.gamma, b)
    area_element = np.sqrt(q(e_theta, e_theta) * q(e_phi, e_phi) - q(e_theta, e_phi) ** 2)
    s_up = np.einsum("nij,nj->ni", np.linalg.inv(geometry.gamma), radial)
    s_up /= np.sqrt(np.einsum("ni,ni->n", s_up, radial))[:, None]
    # d(cos theta) = sin(theta) d theta: divide the Gauss weights by sin(theta).
    w = (weights / np.sin(theta))[:, None] * np.full((1, n_phi), 2 * np.pi / n_phi)
    return float(np.sum(w.reshape(-1) * area_element * integrand(geometry, points, s_up)))


@pytest.mark.parametrize("spin", [0.5, -0.9])
def test_kerr_angular_momentum_is_a_m_about_the_axis(spin):
    # docs/references.md item 6b: J = (1/8 pi) oint K_ij phi^i s^j dA = a M with phi the rotational
    # Killing field (phi = x d_y - y d_x for spin along +z; here axis x (x - c)). In vacuum the
    # integral does not depend on the (axisymmetric) surface: use two coordinate spheres.
    mass, axis, centre = 1.0, np.array([2.0, -1.0, 2.0]) / 3.0, np.array([0.4, 0.1, -0.3])
    spacetime = KerrKerrSchild(mass, spin, axis=axis, centre=centre)

    def density(geometry, points, s_up):
        killing = np.cross(axis, points - centre)
        return np.einsum("nij,ni,nj->n", geometry.K, killing, s_up) / (8 * np.pi)

    for radius in (2.5, 6.0):
        J = sphere_integral(spacetime.geometry, centre, radius, density)
        assert J == pytest.approx(spin * mass, abs=1e-9)


# ---------------------------------------------------------------------------------------------
# Boosted hole


def _boosted_schwarzschild_4metric(mass, velocity, centre, t, x):
    """Independent construction of the boosted Kerr-Schild 4-metric at one event (t, x):
    g'_mu_nu = (dX^a/dx^mu)(dX^b/dx^nu) g_ab(X) with the rest-frame metric written out
    (docs/references.md item 2) and X(x) the Lorentz transformation to the hole's rest frame."""
    v = np.asarray(velocity, float)
    speed = np.linalg.norm(v)
    lf = 1 / np.sqrt(1 - speed**2)
    vhat = v / speed
    rel = np.asarray(x, float) - centre
    parallel = vhat @ rel
    X = rel + (lf - 1) * parallel * vhat - lf * v * t
    jac = np.empty((4, 4))  # jac[a, mu] = dX^a / dx^mu
    jac[0, 0], jac[0, 1:] = lf, -lf * v
    jac[1:, 0], jac[1:, 1:] = -lf * v, EYE + (lf - 1) * np.outer(vhat, vhat)
    r = np.linalg.norm(X)
    n = X / r
    H = 2 * mass / r
    g_rest = np.empty((4, 4))
    g_rest[0, 0] = -(1 - H)
    g_rest[0, 1:] = g_rest[1:, 0] = H * n
    g_rest[1:, 1:] = EYE + H * np.outer(n, n)
    return jac.T @ g_rest @ jac


def _finite_difference_4metric_derivatives(metric, point, step):
    """d_mu g (4,4,4) at (t=0, point) by fourth-order central differences."""
    dg = np.empty((4, 4, 4))
    for mu in range(4):
        e = np.zeros(4)
        e[mu] = step
        at = lambda s: metric(s * e[0], point + s * e[1:])
        dg[mu] = (8 * (at(1) - at(-1)) - (at(2) - at(-2))) / (12 * step)
    return dg


def test_boosted_hole_at_rest_equals_unboosted():
    rng = np.random.default_rng(8)
    centre = np.array([2.0, -1.0, 0.5])
    points = random_points(rng, 80, r_min=0.4, r_max=10.0, centre=centre)
    boosted = BoostedSchwarzschildKerrSchild(1.2, (0.0, 0.0, 0.0), centre)
    rest = SchwarzschildKerrSchild(1.2, centre)
    gb, gr = boosted.geometry(points), rest.geometry(points)
    np.testing.assert_allclose(gb.gamma, gr.gamma, rtol=1e-15, atol=1e-15)
    np.testing.assert_allclose(gb.dgamma, gr.dgamma, rtol=1e-14, atol=1e-15)
    np.testing.assert_allclose(gb.K, gr.K, rtol=1e-14, atol=1e-15)
    fb, fr = boosted.adm_fields(points), rest.adm_fields(points)
    for name in fr:
        np.testing.assert_allclose(fb[name], fr[name], rtol=1e-14, atol=1e-15, err_msg=name)


def test_boosted_hole_matches_finite_differences_of_independent_4metric():
    # Independent check (common practice): K_ij = -alpha 4Gamma^t_ij from central differences
    # in t and x of a separately written boosted 4-metric; and the trace identity
    # d_t ln sqrt(gamma) = -alpha K + D_i beta^i, with D_i beta^i = d_i(sqrt(gamma) beta^i)/sqrt(gamma).
    mass, velocity, centre = 1.0, np.array([0.35, -0.2, 0.4]), np.array([0.5, 1.0, -0.5])
    spacetime = BoostedSchwarzschildKerrSchild(mass, velocity, centre)
    metric = lambda t, x: _boosted_schwarzschild_4metric(mass, velocity, centre, t, x)
    points = centre + np.array([[1.5, 0.9, -1.2], [-2.5, 0.3, 0.8], [0.4, -3.1, 2.2], [1.0, 1.0, 1.0]])
    geometry = spacetime.geometry(points)
    fields = spacetime.adm_fields(points)
    step = 1e-3
    for index, point in enumerate(points):
        g = metric(0.0, point)
        np.testing.assert_allclose(geometry.gamma[index], g[1:, 1:], rtol=1e-13)
        ginv = np.linalg.inv(g)
        alpha = 1 / np.sqrt(-ginv[0, 0])
        assert fields["lapse"][index] == pytest.approx(alpha, rel=1e-13)
        dg = _finite_difference_4metric_derivatives(metric, point, step)
        assert np.abs(dg[0]).max() > 1e-2  # the boosted data really are time dependent
        christoffel_first = 0.5 * (dg.transpose(1, 0, 2) + dg.transpose(1, 2, 0) - dg)
        K = -alpha * np.einsum("l,lij->ij", ginv[0], christoffel_first)[1:, 1:]
        np.testing.assert_allclose(geometry.K[index], K, atol=1e-9)
        np.testing.assert_allclose(geometry.dgamma[index], dg[1:, 1:, 1:], atol=1e-9)

        # Trace identity, all derivatives by finite differences of the independent metric.
        def sqrt_det_gamma(t, x):
            return np.sqrt(np.linalg.det(metric(t, x)[1:, 1:]))

        def densitised_shift(x):
            g4 = metric(0.0, x)
            return sqrt_det_gamma(0.0, x) * np.linalg.solve(g4[1:, 1:], g4[0, 1:])

        div = 0.0
        for k in range(3):
            e = np.zeros(3)
            e[k] = step
            div += (8 * (densitised_shift(point + e) - densitised_shift(point - e))[k]
                    - (densitised_shift(point + 2 * e) - densitised_shift(point - 2 * e))[k]) / (12 * step)
        div /= sqrt_det_gamma(0.0, point)
        s = lambda t: np.log(sqrt_det_gamma(t, point))
        dt_log_sqrt_det = (8 * (s(step) - s(-step)) - (s(2 * step) - s(-2 * step))) / (12 * step)
        trace_K = np.trace(np.linalg.solve(geometry.gamma[index], geometry.K[index]))
        assert trace_K == pytest.approx((div - dt_log_sqrt_det) / alpha, abs=1e-9)


def test_boosted_horizon_is_lorentz_contracted_and_marginally_trapped():
    # docs/references.md item 4 (Matzner, Huq & Shoemaker 1999): at t = 0 the horizon's coordinate
    # shape is contracted along the boost by sqrt(1 - v^2): gamma^2 x_par^2 + x_perp^2 = (2M)^2.
    rng = np.random.default_rng(9)
    mass, velocity, centre = 1.0, np.array([0.0, 0.3, 0.5]), np.array([-1.0, 0.5, 0.0])
    spacetime = BoostedSchwarzschildKerrSchild(mass, velocity, centre)
    lf = spacetime.lorentz_factor
    vhat = velocity / np.linalg.norm(velocity)
    A = EYE + (lf**2 - 1) * np.outer(vhat, vhat)
    for scale, sign in ((1.0, 0), (1.25, 1), (0.8, -1)):
        points, dF, ddF = quadric_surface(rng, 80, A / (2 * mass * scale) ** 2, centre)
        theta = level_set_expansion(spacetime.geometry(points), dF, ddF)
        if sign == 0:
            np.testing.assert_allclose(theta, 0.0, atol=1e-12)
        else:
            assert np.all(np.sign(theta) == sign)
    # The uncontracted sphere r = 2M is not marginally trapped on this slice.
    sphere = random_points(rng, 40, r_min=2 * mass, r_max=2 * mass, centre=centre)
    theta = level_set_expansion(spacetime.geometry(sphere), *sphere_level_set(sphere, centre))
    assert np.abs(theta).max() > 1e-2


def test_boosted_hole_at_later_time_is_translated():
    spacetime = BoostedSchwarzschildKerrSchild(1.0, (0.4, 0.0, -0.3), (1.0, 2.0, 3.0))
    later = spacetime.at_time(2.5)
    np.testing.assert_allclose(later.centre, [2.0, 2.0, 2.25], rtol=1e-15)
    # The metric depends on (t, x) only through x - centre - v t: check on an independent metric.
    point = np.array([[3.0, 1.0, 4.0]])
    g = _boosted_schwarzschild_4metric(1.0, spacetime.velocity, spacetime.centre, 2.5, point[0])
    np.testing.assert_allclose(later.geometry(point).gamma[0], g[1:, 1:], rtol=1e-13)


# ---------------------------------------------------------------------------------------------
# Complex-step derivatives


@pytest.mark.parametrize(
    "spacetime",
    [
        SchwarzschildKerrSchild(1.0, (0.1, 0.2, 0.3)),
        KerrKerrSchild(1.0, 0.8, axis=(1.0, 1.0, 0.0), centre=(0.0, -0.5, 0.2)),
        BoostedSchwarzschildKerrSchild(1.0, (0.5, 0.1, -0.2)),
        BrillLindquist([1.0, 0.6], [[0.0, 0.0, 0.8], [0.3, 0.0, -0.9]]),
    ],
    ids=lambda s: type(s).__name__,
)
def test_point_derivatives_agree_with_central_differences(spacetime):
    # (Painleve-Gullstrand is left out: its gamma is flat, d_k gamma = 0 is asserted above.)
    # Second-order central differences of gamma differ from the exact d_k gamma by O(h^2): the
    # difference must shrink four-fold when h halves (it would stall if d_k gamma were off).
    rng = np.random.default_rng(10)
    points = random_points(rng, 40, r_min=2.0, r_max=6.0)
    exact = spacetime.geometry(points).dgamma

    def central(h):
        out = np.empty_like(exact)
        for k in range(3):
            e = np.zeros(3)
            e[k] = h
            out[:, k] = (spacetime.geometry(points + e).gamma - spacetime.geometry(points - e).gamma) / (2 * h)
        return out

    error_coarse = np.abs(central(2e-3) - exact).max()
    error_fine = np.abs(central(1e-3) - exact).max()
    assert error_fine < 1e-5
    assert 3.5 < error_coarse / error_fine < 4.5


# ---------------------------------------------------------------------------------------------
# Brill-Lindquist


def test_brill_lindquist_conformal_factor_at_points():
    # docs/references.md item 7 (Brill & Lindquist, Phys. Rev. 131, 471 (1963)):
    # psi = 1 + sum m_i / (2 |x - x_i|). Hand values: at (0, 0, 0.5), distances 1 and 2:
    # psi = 1 + 1/2 + 0.5/4 = 1.625; at (2, 0, 0), distances 2.5 and 2.5: psi = 1 + 0.2 + 0.1 = 1.3.
    data = BrillLindquist([1.0, 0.5], [[0.0, 0.0, 1.5], [0.0, 0.0, -1.5]])
    points = np.array([[0.0, 0.0, 0.5], [2.0, 0.0, 0.0]])
    expected = np.array([1.625, 1.3])
    np.testing.assert_allclose(data.conformal_factor(points), expected, rtol=1e-15)
    geometry = data.geometry(points)
    np.testing.assert_allclose(geometry.gamma, expected[:, None, None] ** 4 * EYE, rtol=1e-15)
    np.testing.assert_array_equal(geometry.K, 0.0)
    fields = data.adm_fields(points)
    np.testing.assert_array_equal(fields["lapse"], 1.0)
    np.testing.assert_array_equal(fields["shift_z"], 0.0)
    assert data.total_mass == 1.5


def test_brill_lindquist_at_zero_separation_is_isotropic_schwarzschild():
    # docs/references.md item 8: coincident punctures give Schwarzschild of mass m1 + m2 (item 1).
    rng = np.random.default_rng(11)
    centre = np.array([0.2, 0.1, -0.4])
    points = random_points(rng, 30, r_min=0.2, r_max=5.0, centre=centre)
    merged = BrillLindquist([0.7, 0.5], [centre, centre]).geometry(points)
    single = SchwarzschildIsotropic(1.2, centre).geometry(points)
    np.testing.assert_allclose(merged.gamma, single.gamma, rtol=1e-14)
    np.testing.assert_allclose(merged.dgamma, single.dgamma, rtol=1e-13, atol=1e-15)


def test_node_on_a_puncture_is_not_hidden():
    # Documented behaviour: a node exactly on a puncture gives non-finite values.
    data = BrillLindquist([1.0, 1.0], [[0.0, 0.0, 1.0], [0.0, 0.0, -1.0]])
    patch = sample_patch(data, origin=(-1.0, -1.0, -2.0), spacing=(0.5, 0.5, 0.5), shape=(5, 5, 9),
                         variable_set="conformal_chi")
    bad = ~np.isfinite(patch.fields["gamma_tilde_xx"])
    np.testing.assert_array_equal(np.argwhere(bad), [[2, 2, 2], [2, 2, 6]])
    slice_ = Slice(time=0.0, iteration=0, variable_set="conformal_chi", patches=(patch,))
    with pytest.raises(SliceError, match="non-finite"):
        slice_.check_finite()
    offset = sample_patch(data, origin=(-0.75, -0.75, -1.75), spacing=(0.5, 0.5, 0.5), shape=(4, 4, 8),
                          variable_set="conformal_chi")
    Slice(time=0.0, iteration=0, variable_set="conformal_chi", patches=(offset,)).check_finite()


# ---------------------------------------------------------------------------------------------
# Sampling


def test_sampled_nodes_hold_the_point_values():
    spacetime = KerrKerrSchild(1.0, 0.6, axis=(0.3, -0.4, 0.8), centre=(0.1, 0.0, -0.2))
    origin, spacing, shape = np.array([-3.0, -2.5, -2.0]), np.array([0.5, 0.4, 0.3]), (9, 7, 11)
    patch = sample_patch(spacetime, origin=origin, spacing=spacing, shape=shape, level=2)
    assert patch.level == 2 and patch.shape == shape
    nodes = np.array([[0, 0, 0], [8, 6, 10], [3, 1, 7], [5, 6, 0]])
    values = spacetime.adm_fields(origin + spacing * nodes)
    for name, column in values.items():
        got = patch.fields[name][tuple(nodes.T)]
        np.testing.assert_allclose(got, column, rtol=1e-15, atol=1e-16, err_msg=name)


def test_conformal_variable_sets_convert_back_to_adm():
    # design.md section 2: gamma_ij = gamma_tilde_ij / chi, K_ij = (A_tilde_ij + gamma_tilde_ij K / 3) / chi,
    # W = sqrt(chi), chi = exp(-4 phi).
    spacetime = KerrKerrSchild(1.0, 0.7, axis=(1.0, 0.5, -0.3), centre=(0.05, -0.1, 0.02))
    box = dict(origin=(-2.6, -2.4, -2.2), spacing=(0.4, 0.4, 0.4), shape=(14, 13, 12))
    adm = sample_patch(spacetime, **box, variable_set="adm")
    suffixes = ("xx", "xy", "xz", "yy", "yz", "zz")
    for variable_set in ("conformal_chi", "conformal_w", "conformal_phi"):
        conformal = sample_patch(spacetime, **box, variable_set=variable_set)
        f = conformal.fields
        chi = {"conformal_chi": lambda: f["chi"], "conformal_w": lambda: f["W"] ** 2,
               "conformal_phi": lambda: np.exp(-4 * f["phi"])}[variable_set]()
        gamma_tilde = np.stack([f[f"gamma_tilde_{s}"] for s in suffixes], axis=-1)
        A_tilde = np.stack([f[f"A_tilde_{s}"] for s in suffixes], axis=-1)
        gt = gamma_tilde[..., [0, 1, 2, 1, 3, 4, 2, 4, 5]].reshape(gamma_tilde.shape[:-1] + (3, 3))
        At = A_tilde[..., [0, 1, 2, 1, 3, 4, 2, 4, 5]].reshape(gt.shape)
        np.testing.assert_allclose(np.linalg.det(gt), 1.0, rtol=1e-13)
        np.testing.assert_allclose(np.einsum("...ij,...ij->...", np.linalg.inv(gt), At), 0.0, atol=1e-13)
        for index, s in enumerate(suffixes):
            np.testing.assert_allclose(gamma_tilde[..., index] / chi, adm.fields[f"gamma_{s}"], rtol=1e-13)
            K = (A_tilde[..., index] + gamma_tilde[..., index] * f["trace_K"] / 3) / chi
            np.testing.assert_allclose(K, adm.fields[f"K_{s}"], rtol=1e-11, atol=1e-13)
        for name in ("lapse", "shift_x", "shift_y", "shift_z"):
            np.testing.assert_array_equal(f[name], adm.fields[name])


def test_fortran_memory_order_gives_equal_values():
    spacetime = BoostedSchwarzschildKerrSchild(1.0, (0.2, 0.0, 0.4), (0.1, 0.1, 0.1))
    # More nodes than one evaluation chunk: the two orders walk the nodes differently.
    box = dict(origin=(-3.0, -3.0, -3.0), spacing=(0.3, 0.31, 0.32), shape=(21, 20, 19))
    for variable_set in ("adm", "conformal_w"):
        c_patch = sample_patch(spacetime, **box, variable_set=variable_set, memory_order="C")
        f_patch = sample_patch(spacetime, **box, variable_set=variable_set, memory_order="F")
        assert f_patch.memory_order == "F" and c_patch.memory_order == "C"
        assert set(c_patch.fields) == set(f_patch.fields)
        for name, values in c_patch.fields.items():
            assert values.flags.c_contiguous and f_patch.fields[name].flags.f_contiguous
            np.testing.assert_array_equal(f_patch.fields[name], values, err_msg=name)


def test_chunked_sampling_matches_pointwise_evaluation():
    # More nodes than one evaluation chunk, so chunk boundaries are crossed.
    spacetime = SchwarzschildKerrSchild(1.0, (0.01, 0.02, 0.03))
    patch = sample_patch(spacetime, origin=(-4.0, -4.0, -4.0), spacing=(0.25, 0.25, 0.25), shape=(33, 33, 40))
    axes = patch.node_coordinates()
    grid = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    expected = spacetime.adm_fields(grid)
    for name in ("gamma_xy", "K_zz", "shift_y"):
        np.testing.assert_array_equal(patch.fields[name].reshape(-1), expected[name], err_msg=name)


def test_sample_slice_accepts_dicts_and_tuples():
    spacetime = SchwarzschildIsotropic(1.0, (0.05, 0.05, 0.05))
    slice_ = sample_slice(
        spacetime,
        [dict(origin=(-4, -4, -4), spacing=(1, 1, 1), shape=(9, 9, 9)),
         ((-1, -1, -1), (0.25, 0.25, 0.25), (9, 9, 9), 1),
         ((-2, -2, -2), (0.5, 0.5, 0.5), (9, 9, 9))],
        variable_set="conformal_phi", time=12.5, iteration=300,
    )
    assert slice_.time == 12.5 and slice_.iteration == 300
    assert slice_.variable_set is VariableSet.CONFORMAL_PHI
    assert [p.level for p in slice_.patches] == [0, 1, 0]
    assert "phi" in slice_.patches[1].fields and "lapse" in slice_.patches[1].fields
    slice_.check_finite()
    with pytest.raises(SliceError, match=r"boxes\[0\]"):
        sample_slice(spacetime, [dict(origin=(0, 0, 0), spacing=(1, 1, 1))])
    with pytest.raises(SliceError, match="variable_set"):
        sample_slice(spacetime, [((0, 0, 0), (1, 1, 1), (2, 2, 2))], variable_set="bssn")


@pytest.mark.parametrize(
    "build, field",
    [
        (lambda: SchwarzschildKerrSchild(-1.0), "mass"),
        (lambda: KerrKerrSchild(1.0, 1.0), "spin"),
        (lambda: KerrKerrSchild(1.0, 0.5, axis=(0.0, 0.0, 0.0)), "axis"),
        (lambda: BoostedSchwarzschildKerrSchild(1.0, (0.6, 0.8, 0.0)), "velocity"),
        (lambda: BrillLindquist([1.0, 1.0], [[0.0, 0.0, 1.0]]), "positions"),
        (lambda: SchwarzschildIsotropic(1.0, (0.0, 0.0)), "centre"),
        (lambda: SchwarzschildIsotropic(1.0).geometry(np.zeros((4, 2))), "points"),
        (lambda: sample_patch(SchwarzschildIsotropic(1.0), origin=(0, 0, 0), spacing=(1, 1, 1),
                              shape=(1, 4, 4)), "shape"),
        (lambda: sample_patch(SchwarzschildIsotropic(1.0), origin=(0, 0, 0), spacing=(1, 1, 1),
                              shape=(4, 4, 4), memory_order="X"), "memory_order"),
    ],
)
def test_bad_input_names_the_field(build, field):
    with pytest.raises(ValueError, match=field):
        build()
