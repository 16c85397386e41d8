"""Sampling a slice near points: the smallest diameter of a surface and the shift interpolant
(numerics/surface_diameter.py, numerics/shift_sampling.py)."""

from __future__ import annotations

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_server.numerics.shift_sampling import carries_shift, shift_field, spacing_near
from penumbra_server.numerics.slices import Patch, Slice
from penumbra_server.numerics.surface_diameter import smallest_diameter
from penumbra_server.numerics.surfaces import Surface, angular_grid


def _slice(time: float) -> Slice:
    fields = {n: np.ones((5, 5, 5)) for n in ps.required_fields("adm")}
    return Slice(time=time, iteration=0, variable_set="adm",
                 patches=(Patch(origin=(-4, -4, -4), spacing=(2, 2, 2), shape=(5, 5, 5), level=0, fields=fields),))


def test_smallest_diameter_of_a_spheroid():
    a, c = 0.3, 0.5  # prolate along z: the smallest diameter is the equatorial 2 a
    grid = angular_grid(16)
    h = 1.0 / np.sqrt(np.sin(grid.theta) ** 2 / a**2 + np.cos(grid.theta) ** 2 / c**2)
    surface = Surface((1.0, 2.0, 3.0), 16, grid.project(h))
    # l_max 16 truncation and the direction sampling leave ~2e-4 relative
    assert smallest_diameter(surface) == pytest.approx(2 * a, rel=1e-3)
    assert smallest_diameter(Surface.sphere((0, 0, 0), 0.7, 8)) == pytest.approx(1.4, rel=1e-12)


def test_shift_field_interpolates_the_finest_patch_and_reports_uncovered_points():
    axes = [np.linspace(-1, 1, 9)] * 3
    x, y, z = np.meshgrid(*axes, indexing="ij")
    coarse = {n: np.ones((9, 9, 9)) for n in ps.required_fields("adm")}
    coarse.update(shift_x=0.1 + 0.2 * x - 0.3 * y, shift_y=0.5 * z * x, shift_z=np.zeros_like(x))
    fine_axes = [np.linspace(-0.5, 0.5, 9)] * 3
    fx, fy, fz = np.meshgrid(*fine_axes, indexing="ij")
    fine = {n: np.ones((9, 9, 9)) for n in ps.required_fields("adm")}
    fine.update(shift_x=0.1 + 0.2 * fx - 0.3 * fy, shift_y=0.5 * fz * fx, shift_z=np.full_like(fx, 7.0))
    sl = Slice(time=0.0, iteration=0, variable_set="adm", patches=(
        Patch(origin=(-1, -1, -1), spacing=(0.25,) * 3, shape=(9, 9, 9), level=0, fields=coarse),
        Patch(origin=(-0.5, -0.5, -0.5), spacing=(0.125,) * 3, shape=(9, 9, 9), level=1, fields=fine)))
    beta = shift_field(sl, (-1, -1, -1), (1, 1, 1))
    points = np.array([[0.03, -0.02, 0.01], [0.6, 0.1, -0.2], [5.0, 0.0, 0.0]])
    values = beta(points)
    # 4th-order Lagrange interpolation is exact for these polynomials; the fine patch (shift_z = 7)
    # serves the first point, the coarse one (shift_z = 0) the second, none the third.
    for i in range(2):
        p = points[i]
        np.testing.assert_allclose(values[i, :2], [0.1 + 0.2 * p[0] - 0.3 * p[1], 0.5 * p[2] * p[0]], atol=1e-13)
    assert values[0, 2] == pytest.approx(7.0, rel=1e-13) and values[1, 2] == 0.0
    assert np.all(np.isnan(values[2]))
    assert shift_field(_slice(0.0), (-1, -1, -1), (1, 1, 1)) is None  # no shift in the slice
    assert carries_shift(sl) and not carries_shift(_slice(0.0))


def test_spacing_near_a_point_is_the_finest_patch_holding_it():
    fields = {n: np.ones((9, 9, 9)) for n in ps.required_fields("adm")}
    sl = Slice(time=0.0, iteration=0, variable_set="adm", patches=(
        Patch(origin=(-1, -1, -1), spacing=(0.25,) * 3, shape=(9, 9, 9), level=0, fields=fields),
        Patch(origin=(-0.5, -0.5, -0.5), spacing=(0.125, 0.125, 0.1), shape=(9, 9, 9), level=1, fields=fields)))
    assert spacing_near(sl, (0.0, 0.0, 0.0)) == 0.125  # the finer patch, its largest component
    assert spacing_near(sl, (0.9, 0.0, 0.0)) == 0.25  # only the coarse patch holds it
    assert spacing_near(sl, (5.0, 0.0, 0.0)) == 0.125  # outside every patch: the finest spacing
