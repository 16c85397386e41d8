"""The displaced surfaces' expansion (numerics/displaced.parametric_expansion), written with batched
matrix products for speed, against the same formula contracted index by index with einsum and the
Christoffel symbols of numerics/curvature.py, on random data; and the flat-space sphere."""

from __future__ import annotations

import numpy as np

from penumbra_server.numerics.curvature import christoffel_lower
from penumbra_server.numerics.displaced import Embedding, parametric_expansion
from penumbra_server.numerics.geometry import PointGeometry


def _index_by_index(emb: Embedding, geometry: PointGeometry) -> np.ndarray:
    """Theta = q^ab k_ab - K + K_ij s^i s^j with k_ab = -(s_j x_ab^j + s_j Gamma^j_ik x_a^i x_b^k)
    (s the unit normal covector; common practice for the expansion of a parametrised surface)."""
    g, K = geometry.gamma, geometry.K
    ginv = np.linalg.inv(g)
    s = np.cross(emb.x_t, emb.x_p)
    s_up = np.einsum("nij,nj->ni", ginv, s)
    norm = np.sqrt(np.einsum("ni,ni->n", s, s_up))
    s, s_up = s / norm[:, None], s_up / norm[:, None]
    tangents = np.stack([emb.x_t, emb.x_p], axis=1)
    q = np.einsum("nai,nij,nbj->nab", tangents, g, tangents)
    second = np.stack([np.stack([emb.x_tt, emb.x_tp], 1), np.stack([emb.x_tp, emb.x_pp], 1)], 1)
    s_gamma = np.einsum("nl,nlik->nik", s_up, christoffel_lower(geometry.dgamma))
    k_ab = -(np.einsum("nj,nabj->nab", s, second) + np.einsum("nik,nai,nbk->nab", s_gamma, tangents, tangents))
    return (np.einsum("nab,nab->n", np.linalg.inv(q), k_ab) - np.einsum("nij,nij->n", ginv, K)
            + np.einsum("nij,ni,nj->n", K, s_up, s_up))


def test_the_fast_contractions_agree_with_the_index_by_index_formula():
    rng = np.random.default_rng(20261203)
    n = 500
    a = rng.normal(size=(n, 3, 3)) * 0.2
    gamma = np.eye(3) + np.einsum("nij,nkj->nik", a, a)  # symmetric positive definite
    d = rng.normal(size=(n, 3, 3, 3))
    dgamma = 0.5 * (d + np.swapaxes(d, 2, 3))  # symmetric in the metric's indices
    k = rng.normal(size=(n, 3, 3))
    curvature = 0.5 * (k + np.swapaxes(k, 1, 2))
    geometry = PointGeometry(gamma, dgamma, curvature, np.ones(n, bool), np.zeros(n, int))
    vectors = rng.normal(size=(6, n, 3))
    emb = Embedding(np.zeros(n), np.zeros(n), *vectors)
    fast = parametric_expansion(emb, geometry)
    expected = _index_by_index(emb, geometry)
    np.testing.assert_allclose(fast.theta, expected, rtol=1e-11, atol=1e-11 * np.max(np.abs(expected)))
    normal = np.cross(emb.x_t, emb.x_p)
    assert np.allclose(np.cross(fast.normal_down, normal), 0.0, atol=1e-12)  # along the covector normal


def test_a_coordinate_sphere_in_flat_space_expands_at_two_over_its_radius():
    # Theta = 2/r and dA = r^2 sin(theta) dtheta dphi for a round sphere in flat space with K_ij = 0
    # (common practice: the mean curvature of a sphere).
    radius, n = 1.7, 64
    theta, phi = np.meshgrid(np.linspace(0.2, 2.9, 8), np.linspace(0.0, 6.0, 8), indexing="ij")
    theta, phi = theta.ravel(), phi.ravel()
    st, ct, sp, cp = np.sin(theta), np.cos(theta), np.sin(phi), np.cos(phi)
    x = radius * np.stack([st * cp, st * sp, ct], 1)
    x_t = radius * np.stack([ct * cp, ct * sp, -st], 1)
    x_p = radius * np.stack([-st * sp, st * cp, 0 * st], 1)
    x_tt, x_tp = -x, radius * np.stack([-ct * sp, ct * cp, 0 * st], 1)
    x_pp = radius * np.stack([-st * cp, -st * sp, 0 * st], 1)
    flat = PointGeometry(np.broadcast_to(np.eye(3), (n, 3, 3)).copy(), np.zeros((n, 3, 3, 3)), np.zeros((n, 3, 3)),
                         np.ones(n, bool), np.zeros(n, int))
    terms = parametric_expansion(Embedding(theta, phi, x, x_t, x_p, x_tt, x_tp, x_pp), flat)
    np.testing.assert_allclose(terms.theta, 2.0 / radius, rtol=1e-13)
    np.testing.assert_allclose(terms.area_density, radius**2 * st, rtol=1e-13)
