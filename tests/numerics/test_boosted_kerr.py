"""The boosted Kerr-Schild Kerr hole against an independent symbolic derivation.

References (shared reference list): item 3 (Kerr in Cartesian Kerr-Schild form; Kerr & Schild
1965; Visser, arXiv:0706.0622 (2007)) and item 4 (boosted Kerr-Schild holes; Matzner, Huq &
Shoemaker, PRD 59, 024015 (1999)).
"""

import numpy as np
import pytest
import sympy as sp

from penumbra_server.numerics.boosted_kerr import BoostedKerrKerrSchild
from penumbra_server.numerics.finder import FinderSettings, find_surface
from penumbra_server.numerics.spacetimes import KerrKerrSchild, sample_patch
from penumbra_server.numerics.surfaces import Surface, angular_grid


def _symbolic_boosted_kerr(mass, spin, axis, velocity, centre):
    """Callable point -> (g (4,4), d_mu g (4,4,4)) at t = 0 for Kerr (spin along ``axis`` in its
    rest frame) boosted with ``velocity``. The rest-frame Kerr-Schild metric is written out and
    differentiated by sympy (references item 3; stationary, so d_T g = 0); the boost enters as
    the tensor transformation g'_mu_nu = J^a_mu J^b_nu g_ab(X) with the constant Jacobian
    J^a_mu = dX^a/dx^mu of the Lorentz transformation X(t, x) written out here, and
    d_mu g'_ab... = J J J^c_mu d_c g by the chain rule."""
    X, Y, Z = sp.symbols("X Y Z", real=True)
    a, m = sp.nsimplify(spin), sp.nsimplify(mass)
    rho2 = X**2 + Y**2 + Z**2
    r2 = (rho2 - a**2 + sp.sqrt((rho2 - a**2) ** 2 + 4 * a**2 * Z**2)) / 2
    r = sp.sqrt(r2)
    f = 2 * m * r**3 / (r**4 + a**2 * Z**2)
    l_rest = [sp.Integer(1), (r * X + a * Y) / (r**2 + a**2), (r * Y - a * X) / (r**2 + a**2), Z / r]
    eta = sp.diag(-1, 1, 1, 1)
    pairs = [(A, B) for A in range(4) for B in range(A, 4)]
    comps = [eta[A, B] + f * l_rest[A] * l_rest[B] for A, B in pairs]
    derivs = [sp.diff(c, q) for q in (X, Y, Z) for c in comps]
    evaluate = sp.lambdify((X, Y, Z), comps + derivs, modules="numpy", cse=True)

    v = np.asarray(velocity, float)
    speed = np.linalg.norm(v)
    lf = 1 / np.sqrt(1 - speed**2)
    vhat = v / speed
    jac = np.empty((4, 4))  # jac[a, mu] = dX^a / dx^mu, X^0 = lf (t - v.x), X = x + (lf-1)(vhat.x)vhat - lf v t
    jac[0, 0], jac[0, 1:] = lf, -lf * v
    jac[1:, 0], jac[1:, 1:] = -lf * v, np.eye(3) + (lf - 1) * np.outer(vhat, vhat)
    # Rest-frame body coordinates (Z along the axis): any rotation whose third row is the axis.
    e3 = np.asarray(axis, float) / np.linalg.norm(axis)
    e1 = np.cross([0.3, 0.9, -0.2], e3)
    e1 /= np.linalg.norm(e1)
    rotation = np.eye(4)
    rotation[1:, 1:] = np.array([e1, np.cross(e3, e1), e3])
    jac = rotation @ jac

    def at(point):
        rest_point = jac[1:, 1:] @ (np.asarray(point) - centre)  # at t = 0
        values = evaluate(*rest_point)
        g, dg = np.empty((4, 4)), np.zeros((4, 4, 4))  # dg[c] = d_c g_rest, d_T g_rest = 0
        for index, (A, B) in enumerate(pairs):
            g[A, B] = g[B, A] = values[index]
            for k in range(3):
                dg[k + 1, A, B] = dg[k + 1, B, A] = values[(k + 1) * len(pairs) + index]
        return jac.T @ g @ jac, np.einsum("cm,cab,ai,bj->mij", jac, dg, jac, jac)

    return at


def test_boosted_kerr_matches_sympy_derivation():
    # K_ij = -alpha 4Gamma^t_ij on t = 0 (n_mu = (-alpha, 0, 0, 0); the sign with
    # K = -nabla_mu n^mu), alpha = (-g^tt)^(-1/2), with the time derivatives included.
    mass, spin, axis = 1.0, 0.7, np.array([0.4, -0.55, 0.73])
    velocity, centre = np.array([0.3, -0.2, 0.25]), np.array([0.4, -0.3, 0.2])
    spacetime = BoostedKerrKerrSchild(mass, spin, axis=axis, velocity=velocity, centre=centre)
    symbolic = _symbolic_boosted_kerr(mass, spin, axis, velocity, centre)
    points = centre + np.array([[1.6, -0.9, 0.8], [2.4, 0.5, -1.9], [-0.7, 1.8, 0.4], [1.2, 1.1, -1.3]])
    geometry = spacetime.geometry(points)
    fields = spacetime.adm_fields(points)
    for index, point in enumerate(points):
        g, dg = symbolic(point)
        assert np.abs(dg[0]).max() > 1e-2  # the boosted data really are time dependent
        ginv = np.linalg.inv(g)
        alpha = 1 / np.sqrt(-ginv[0, 0])
        christoffel_first = 0.5 * (dg.transpose(1, 0, 2) + dg.transpose(1, 2, 0) - dg)  # [l, mu, nu]
        K = -alpha * np.einsum("l,lij->ij", ginv[0], christoffel_first)[1:, 1:]
        np.testing.assert_allclose(geometry.K[index], K, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(geometry.gamma[index], g[1:, 1:], rtol=1e-13)
        np.testing.assert_allclose(geometry.dgamma[index], dg[1:, 1:, 1:], rtol=1e-10, atol=1e-12)
        assert fields["lapse"][index] == pytest.approx(alpha, rel=1e-13)
        shift = ginv[0, 1:] / -ginv[0, 0]  # g^ti = beta^i / alpha^2
        np.testing.assert_allclose([fields[f"shift_{c}"][index] for c in "xyz"], shift, rtol=1e-12, atol=1e-14)


def test_boosted_kerr_at_rest_equals_kerr():
    rng = np.random.default_rng(3)
    axis, centre = np.array([1.0, -2.0, 2.0]) / 3.0, np.array([0.3, -0.2, 1.5])
    points = centre + rng.uniform(-4, 4, size=(60, 3))
    moving = BoostedKerrKerrSchild(1.0, 0.8, axis=axis, velocity=(0.0, 0.0, 0.0), centre=centre)
    rest = KerrKerrSchild(1.0, 0.8, axis=axis, centre=centre)
    gm, gr = moving.geometry(points), rest.geometry(points)
    np.testing.assert_allclose(gm.gamma, gr.gamma, rtol=1e-14, atol=1e-15)
    np.testing.assert_allclose(gm.K, gr.K, rtol=1e-12, atol=1e-14)


def test_boosted_kerr_horizon_is_lorentz_contracted():
    # references item 4 (Matzner, Huq & Shoemaker 1999): on t = 0 the horizon is the rest-frame
    # one contracted along v by sqrt(1 - v^2). Rest frame: the Kerr-Schild spheroid
    # (x^2 + y^2)/(r_+^2 + a^2) + z^2/r_+^2 = 1 about the spin axis (item 3).
    a, v = 0.6, np.array([0.5, 0.0, 0.0])  # boost across the spin axis z
    hole = BoostedKerrKerrSchild(1.0, a, axis=(0.0, 0.0, 1.0), velocity=v)
    result = find_surface(hole, Surface.sphere([0, 0, 0], 1.8, 14), settings=FinderSettings(lmax=14))
    assert result.success, result.message
    pts = result.surface.points(result.surface.on_grid(angular_grid(14)))
    rest = pts.copy()
    rest[:, 0] *= hole.lorentz_factor  # undo the contraction along x
    rp = hole.horizon_radius
    level = (rest[:, 0] ** 2 + rest[:, 1] ** 2) / (rp**2 + a * a) + rest[:, 2] ** 2 / rp**2
    np.testing.assert_allclose(level, 1.0, atol=1e-6)


def test_boosted_kerr_rejects_bad_input():
    with pytest.raises(ValueError, match="velocity"):
        BoostedKerrKerrSchild(1.0, 0.5, velocity=(0.6, 0.8, 0.0))
    with pytest.raises(ValueError, match="spin"):
        BoostedKerrKerrSchild(1.0, 1.2, velocity=(0.1, 0.0, 0.0))
    with pytest.raises(ValueError, match="axis"):
        BoostedKerrKerrSchild(1.0, 0.5, axis=(0.0, 0.0, 0.0))


def test_boosted_kerr_samples_onto_a_patch():
    hole = BoostedKerrKerrSchild(1.0, 0.5, velocity=(0.0, 0.3, 0.0))
    patch = sample_patch(hole, origin=[-3.03, -3.03, -3.03], spacing=[0.5] * 3, shape=[13] * 3)
    assert np.all(np.isfinite(patch.fields["K_xy"]))
    point = np.array([[-3.03 + 0.5 * 2, -3.03 + 0.5 * 5, -3.03 + 0.5 * 9]])
    assert patch.fields["K_xy"][2, 5, 9] == pytest.approx(hole.adm_fields(point)["K_xy"][0], rel=1e-14)
