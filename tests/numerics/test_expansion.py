"""The expansion formula against independent evaluations and published closed forms."""

import numpy as np
import pytest

from penumbra_server.numerics.expansion import expansion_at
from penumbra_server.numerics.geometry import PointGeometry
from penumbra_server.numerics.spacetimes import (
    BoostedSchwarzschildKerrSchild,
    KerrKerrSchild,
    SchwarzschildKerrSchild,
    SchwarzschildPainleveGullstrand,
)
from penumbra_server.numerics.surfaces import Surface, angular_grid


def flat(points):
    n = len(points)
    return PointGeometry(np.tile(np.eye(3), (n, 1, 1)), np.zeros((n, 3, 3, 3)), np.zeros((n, 3, 3)),
                         np.ones(n, bool), -np.ones(n, int))


def distorted_surface(centre, radius, lmax=6, amplitude=0.06, seed=1):
    rng = np.random.default_rng(seed)
    s = Surface.sphere(centre, radius, lmax)
    c = s.coefficients.copy()
    c[1:] = amplitude * radius * rng.normal(size=c.size - 1) / np.arange(2, c.size + 1)
    return Surface(s.centre, lmax, c)


def expansion_by_divergence(spacetime, surface, points, step=2e-3, inner_step=1e-4):
    """Theta = (1/sqrt(gamma)) d_i(sqrt(gamma) s^i) - K + K_ij s^i s^j with every derivative taken
    by fourth-order finite differences of the level set F = |x - c| - h and of the metric
    values: no use of the analytic level-set derivatives, the Christoffel terms or d gamma."""
    c = surface.centre

    def level(x):
        rel = x - c
        r = np.linalg.norm(rel, axis=1)
        th = np.arccos(rel[:, 2] / r)
        ph = np.arctan2(rel[:, 1], rel[:, 0])
        return r - surface.radius(th, ph)

    def fd(f, x, h):
        out = []
        for k in range(3):
            e = np.zeros(3)
            e[k] = h
            out.append((-f(x + 2 * e) + 8 * f(x + e) - 8 * f(x - e) + f(x - 2 * e)) / (12 * h))
        return np.stack(out, axis=-1)

    def densitised_normal(x):  # sqrt(gamma) s^i, shape (N, 3)
        g = spacetime.geometry(x).gamma
        ginv = np.linalg.inv(g)
        dF = fd(level, x, inner_step)
        up = np.einsum("nij,nj->ni", ginv, dF)
        u = np.sqrt(np.einsum("ni,ni->n", up, dF))
        return np.sqrt(np.linalg.det(g))[:, None] * up / u[:, None]

    div = np.zeros(len(points))
    for k in range(3):
        e = np.zeros(3)
        e[k] = step
        f = lambda x: densitised_normal(x)[:, k]
        div += (-f(points + 2 * e) + 8 * f(points + e) - 8 * f(points - e) + f(points - 2 * e)) / (12 * step)
    geo = spacetime.geometry(points)
    div /= np.sqrt(np.linalg.det(geo.gamma))
    s_up = densitised_normal(points) / np.sqrt(np.linalg.det(geo.gamma))[:, None]
    ginv = np.linalg.inv(geo.gamma)
    return div - np.einsum("nij,nij->n", ginv, geo.K) + np.einsum("nij,ni,nj->n", geo.K, s_up, s_up)


def test_flat_space_sphere_has_expansion_two_over_radius():
    # Common practice (mean curvature of a round sphere in flat space is 2/R).
    s = Surface.sphere([0.3, -0.2, 0.1], 1.7, 4)
    rd = s.on_grid(angular_grid(4))
    np.testing.assert_allclose(expansion_at(rd, flat(s.points(rd))).theta, 2 / 1.7, rtol=1e-13)


@pytest.mark.parametrize(
    "spacetime",
    [
        KerrKerrSchild(mass=1.0, spin=0.6, axis=np.array([0.3, -0.5, 0.81]), centre=np.array([0.2, 0.1, -0.3])),
        BoostedSchwarzschildKerrSchild(mass=1.0, velocity=np.array([0.3, 0.2, 0.0]), centre=np.zeros(3)),
    ],
    ids=["kerr-tilted", "boosted"],
)
def test_expansion_matches_independent_divergence_evaluation(spacetime):
    surface = distorted_surface(np.array([0.25, 0.05, -0.2]), 1.9)
    grid = angular_grid(surface.lmax)
    rd = surface.on_grid(grid)
    pts = surface.points(rd)
    ours = expansion_at(rd, spacetime.geometry(pts)).theta
    independent = expansion_by_divergence(spacetime, surface, pts)
    assert np.ptp(ours) > 0.05  # the test surface really is distorted
    np.testing.assert_allclose(ours, independent, atol=2e-7)


def test_kerr_schild_spheres_follow_the_closed_form():
    # Theta(r) = (2 alpha / r)(1 - 2M/r), alpha = (1 + 2M/r)^(-1/2): Matzner, Huq & Shoemaker,
    # PRD 59, 024015 (1999); Cook, Living Rev. Relativity 3, 5 (2000) (docs/references.md item 2).
    st = SchwarzschildKerrSchild(mass=1.0, centre=np.zeros(3))
    grid = angular_grid(4)
    for r in (1.2, 2.0, 3.5):
        s = Surface.sphere([0, 0, 0], r, 4)
        rd = s.on_grid(grid)
        alpha = (1 + 2 / r) ** -0.5
        np.testing.assert_allclose(
            expansion_at(rd, st.geometry(s.points(rd))).theta, 2 * alpha / r * (1 - 2 / r), atol=1e-13
        )


def test_painleve_gullstrand_spheres_follow_the_closed_form():
    # Theta(r) = (2/r)(1 - sqrt(2M/r)); all of it beyond 2/r comes from K_ij
    # (Painleve 1921, Gullstrand 1922; docs/references.md item 2b).
    st = SchwarzschildPainleveGullstrand(mass=1.0, centre=np.zeros(3))
    grid = angular_grid(4)
    for r in (1.0, 2.0, 5.0):
        s = Surface.sphere([0, 0, 0], r, 4)
        rd = s.on_grid(grid)
        np.testing.assert_allclose(
            expansion_at(rd, st.geometry(s.points(rd))).theta, (2 / r) * (1 - np.sqrt(2 / r)), atol=1e-13
        )
