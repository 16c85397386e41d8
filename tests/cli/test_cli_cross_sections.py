"""Horizon cross-sections evaluated from harmonic coefficients."""

import numpy as np
import pytest

from penumbra_server.cli.cross_sections import cross_section
from penumbra_server.numerics.surfaces import Surface, coefficient_count

# Orthonormal real harmonics of degree 1 in the numerics' convention (numerics/surfaces.py builds
# them from scipy's spherical Legendre functions, which carry the Condon-Shortley phase (-1)^m):
# Y_10 = sqrt(3 / 4 pi) z / r,  Y_11 = -sqrt(3 / 4 pi) x / r,  Y_1,-1 = -sqrt(3 / 4 pi) y / r;
# index l*l + l + m. Archived coefficients use the same convention.
Y1 = np.sqrt(3.0 / (4.0 * np.pi))


def _coefficients(lmax, **entries):
    c = np.zeros(coefficient_count(lmax))
    for index, value in entries.items():
        c[int(index[1:])] = value
    return c


def test_sphere_gives_a_circle_of_its_radius_about_the_centre():
    sphere = Surface.sphere((0.3, -0.2, 0.1), 0.45, 6)
    for plane in ("xy", "xz", "yz"):
        cs = cross_section(sphere.centre, sphere.lmax, sphere.coefficients, plane=plane, samples=64)
        np.testing.assert_allclose(cs.radius, 0.45, rtol=1e-12)
        np.testing.assert_allclose(np.linalg.norm(cs.points - sphere.centre, axis=1), 0.45, rtol=1e-12)


def test_degree_one_terms_shift_the_curve_as_the_harmonics_say():
    a0, b = 0.5 * np.sqrt(4 * np.pi), 0.05
    centre = np.array([1.0, 2.0, -0.5])
    # h = 0.5 + b Y1 z/r: in the xz plane (direction (cos a, 0, sin a)) h = 0.5 + b Y1 sin(a).
    cs = cross_section(centre, 3, _coefficients(3, i0=a0, i2=b), plane="xz", samples=90)
    np.testing.assert_allclose(cs.radius, 0.5 + b * Y1 * np.sin(cs.alpha), rtol=1e-12, atol=1e-14)
    # ... and in the xy plane (theta = pi/2) the z term vanishes.
    cs_xy = cross_section(centre, 3, _coefficients(3, i0=a0, i2=b), plane="xy", samples=90)
    np.testing.assert_allclose(cs_xy.radius, 0.5, rtol=1e-12)
    np.testing.assert_allclose(cs_xy.points[:, 2], centre[2])
    # Coefficients b of Y_11 and Y_1,-1 in the xy plane: h = 0.5 - b Y1 (cos a + sin a).
    cs_xy = cross_section(centre, 3, _coefficients(3, i0=a0, i3=b, i1=b), plane="xy", samples=90)
    np.testing.assert_allclose(cs_xy.radius, 0.5 - b * Y1 * (np.cos(cs_xy.alpha) + np.sin(cs_xy.alpha)), rtol=1e-12)
    u, v = cs_xy.in_plane()
    np.testing.assert_allclose(u, centre[0] + cs_xy.radius * np.cos(cs_xy.alpha))
    np.testing.assert_allclose(v, centre[1] + cs_xy.radius * np.sin(cs_xy.alpha))


def test_agrees_with_the_surface_points_of_the_numerics_on_a_generic_shape():
    rng = np.random.default_rng(7)
    lmax = 6
    c = 0.01 * rng.standard_normal(coefficient_count(lmax))
    c[0] = 0.4 * np.sqrt(4 * np.pi)
    surface = Surface(np.array([0.1, 0.0, 0.2]), lmax, c)
    cs = cross_section(surface.centre, lmax, c, plane="yz", samples=40)
    # yz plane: direction (0, cos a, sin a) -> theta = arccos(sin a), phi = +-pi/2.
    theta = np.arccos(np.sin(cs.alpha))
    phi = np.where(np.cos(cs.alpha) >= 0, np.pi / 2, 3 * np.pi / 2)
    expected = surface.points(surface.at(theta, phi))
    np.testing.assert_allclose(cs.points, expected, atol=1e-12)


def test_bad_input_names_the_field():
    sphere = Surface.sphere((0, 0, 0), 0.5, 2)
    with pytest.raises(ValueError, match="plane"):
        cross_section(sphere.centre, 2, sphere.coefficients, plane="xw")
    with pytest.raises(ValueError, match="coefficients"):
        cross_section(sphere.centre, 2, np.full(9, np.nan))
    with pytest.raises(ValueError, match="coefficients"):
        cross_section(sphere.centre, 3, sphere.coefficients)
