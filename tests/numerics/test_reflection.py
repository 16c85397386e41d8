"""Reflection symmetry through z = 0: the mirrored half slice equals the full slice."""

import numpy as np
import pytest

from penumbra_server.numerics import spacetimes
from penumbra_server.numerics.reflection import (
    field_parity,
    mirror_patch_through_z0,
    mirror_slice_through_z0,
)
from penumbra_server.numerics.slices import (
    Patch,
    Slice,
    SliceError,
    optional_fields,
    required_fields,
)

SPACING = np.array([0.25, 0.2, 0.15])

#: The components odd under z -> -z, listed by hand (independent of the module's naming rule).
ODD = {"shift_z"} | {f"{stem}_{c}" for stem in ("gamma", "K", "gamma_tilde", "A_tilde") for c in ("xz", "yz")}


def analytic_field(name, x, y, z):
    """A field with the parity of its name under z -> -z (one factor z per z index), plus
    terms even in z, so a wrong sign in the mirror shows everywhere off the plane."""
    base = 1.0 + 0.1 * x + 0.05 * y * y + 0.3 * z * z + 0.01 * (sum(map(ord, name)) % 7)
    return base * (z * (1 + 0.2 * x) if name in ODD else 1.0 + 0.1 * np.cos(z))


def sampled_patch(names, *, z0, nz, nx=7, ny=6, origin_xy=(-0.8, -0.5), level=0, order="C"):
    origin = np.array([origin_xy[0], origin_xy[1], z0])
    shape = (nx, ny, nz)
    axes = [origin[a] + SPACING[a] * np.arange(shape[a]) for a in range(3)]
    x, y, z = np.meshgrid(*axes, indexing="ij")
    make = np.asfortranarray if order == "F" else np.ascontiguousarray
    return Patch(origin=origin, spacing=SPACING, shape=shape, level=level, memory_order=order,
                 fields={n: make(analytic_field(n, x, y, z)) for n in names})


def all_names(variable_set):
    return required_fields(variable_set) + optional_fields(variable_set)


def test_parity_rule_per_component():
    for stem in ("gamma", "K", "gamma_tilde", "A_tilde"):
        assert field_parity(f"{stem}_xz") == -1 and field_parity(f"{stem}_yz") == -1
        for even in ("xx", "xy", "yy", "zz"):
            assert field_parity(f"{stem}_{even}") == 1
    assert field_parity("shift_z") == -1
    assert field_parity("shift_x") == 1 and field_parity("shift_y") == 1
    for scalar in ("chi", "W", "phi", "trace_K", "lapse"):
        assert field_parity(scalar) == 1
    assert field_parity("B_x", parity_overrides={"B_x": -1}) == -1


@pytest.mark.parametrize("variable_set", ["adm", "conformal_chi", "conformal_w", "conformal_phi"])
@pytest.mark.parametrize("order", ["C", "F"])
def test_mirrored_half_slice_equals_the_full_slice(variable_set, order):
    names = all_names(variable_set)
    nz_half = 6
    half = Slice(time=3.5, iteration=70, variable_set=variable_set,
                 patches=(sampled_patch(names, z0=0.0, nz=nz_half, order=order),))
    full = sampled_patch(names, z0=-(nz_half - 1) * SPACING[2], nz=2 * nz_half - 1, order=order)
    mirrored = mirror_slice_through_z0(half)
    assert (mirrored.time, mirrored.iteration, mirrored.variable_set) == (3.5, 70, half.variable_set)
    (patch,) = mirrored.patches
    assert patch.shape == full.shape and patch.memory_order == order
    np.testing.assert_allclose(patch.origin, full.origin, atol=1e-15)
    np.testing.assert_array_equal(patch.spacing, full.spacing)
    for name in names:
        np.testing.assert_allclose(patch.fields[name], full.fields[name], rtol=0, atol=1e-14, err_msg=name)
        if order == "F":
            assert patch.fields[name].flags.f_contiguous
    # The odd fields really are odd and non-zero off the plane (the test would see a sign error).
    k_plane = nz_half - 1
    for name in names:
        values = patch.fields[name]
        if name in ODD:
            np.testing.assert_allclose(values[:, :, k_plane], 0.0, atol=1e-15)
            assert np.min(np.abs(values[:, :, k_plane + 1])) > 0
            np.testing.assert_allclose(values[:, :, k_plane - 1], -values[:, :, k_plane + 1])


def test_patch_above_the_plane_is_mirrored_to_a_separate_patch():
    names = all_names("adm")
    off = sampled_patch(names, z0=0.6, nz=4, level=2)
    base = sampled_patch(names, z0=0.0, nz=8, level=0)
    half = Slice(time=0.0, iteration=0, variable_set="adm", patches=(base, off))
    mirrored = mirror_slice_through_z0(half)
    assert len(mirrored.patches) == 3
    assert [p.level for p in mirrored.patches] == [0, 2, 2]
    image = mirrored.patches[2]
    np.testing.assert_allclose(image.origin[2], -off.upper[2])
    expected = sampled_patch(names, z0=-off.upper[2], nz=4)
    for name in names:
        np.testing.assert_allclose(image.fields[name], expected.fields[name], atol=1e-14, err_msg=name)


@pytest.mark.parametrize("z0, message", [(0.075, "dz/2"), (0.05, "between the plane"), (-0.15, "< 0")])
def test_unsupported_or_invalid_grids_are_refused(z0, message):
    half = Slice(time=0.0, iteration=0, variable_set="adm",
                 patches=(sampled_patch(all_names("adm"), z0=z0, nz=5),))
    with pytest.raises(SliceError, match=message):
        mirror_slice_through_z0(half)


def test_bad_parity_override_is_refused():
    p = sampled_patch(["lapse"] + list(required_fields("adm")), z0=0.0, nz=3)
    with pytest.raises(SliceError, match="parity_overrides"):
        mirror_patch_through_z0(p, parity_overrides={"lapse": 0})


@pytest.mark.parametrize("which", ["brill_lindquist", "kerr_z_spin"])
def test_mirrored_half_grid_reference_spacetime_equals_the_full_grid_sample(which):
    """Brill-Lindquist punctures in the plane z = 0 (docs/references.md item 7) and Kerr in
    Kerr-Schild form spinning along z (docs/references.md item 3): both are symmetric under z -> -z,
    Kerr with non-zero K_ij and shift, so the odd components are exercised."""
    st = spacetimes
    if which == "brill_lindquist":
        spacetime = st.BrillLindquist(masses=[0.5, 0.5], positions=[[0.6, 0.0, 0.0], [-0.6, 0.0, 0.0]])
    else:
        spacetime = st.KerrKerrSchild(mass=1.0, spin=0.6)
    # x and y nodes are offset so none falls on a puncture. Kerr-Schild data are singular on the
    # disc r = 0 spanned by the ring (z = 0, x^2 + y^2 <= a^2), so the Kerr box stays at x > a.
    spacing = (0.23, 0.21, 0.2)
    nz = 7
    x0, nx = (-1.43, 13) if which == "brill_lindquist" else (0.83, 9)
    half_box = dict(origin=(x0, -1.37, 0.0), spacing=spacing, shape=(nx, 13, nz))
    full_box = dict(origin=(x0, -1.37, -(nz - 1) * spacing[2]), spacing=spacing, shape=(nx, 13, 2 * nz - 1))
    for variable_set in ("adm", "conformal_chi"):
        half = st.sample_slice(spacetime, [half_box], variable_set=variable_set)
        full = st.sample_slice(spacetime, [full_box], variable_set=variable_set)
        half.check_finite()
        (mirrored,) = mirror_slice_through_z0(half).patches
        (expected,) = full.patches
        np.testing.assert_allclose(mirrored.origin, expected.origin, atol=1e-14)
        for name, values in expected.fields.items():
            scale = max(1.0, float(np.max(np.abs(values))))
            np.testing.assert_allclose(mirrored.fields[name], values, rtol=0, atol=1e-12 * scale,
                                       err_msg=f"{which} {variable_set} {name}")
        if which == "kerr_z_spin":
            # Non-trivial odd data: K_xz and shift_z are non-zero off the plane.
            for name in ("K_xz", "shift_z") if variable_set == "adm" else ("A_tilde_yz", "shift_z"):
                assert np.max(np.abs(expected.fields[name])) > 1e-3


# --- finder level: half grids mirrored give the surfaces of the full grid ---------------------


def _half_and_full(spacetime, half_width, spacing, variable_set):
    from penumbra_server.numerics.spacetimes import sample_slice

    n = int(round(2 * half_width / spacing)) + 1
    nz = (n + 1) // 2
    origin = [-half_width + 0.31 * spacing, -half_width + 0.27 * spacing, 0.0]
    full_box = dict(origin=[origin[0], origin[1], -(nz - 1) * spacing], spacing=[spacing] * 3, shape=[n, n, 2 * nz - 1])
    half_box = dict(origin=origin, spacing=[spacing] * 3, shape=[n, n, nz])
    full = sample_slice(spacetime, [full_box], variable_set=variable_set)
    half = sample_slice(spacetime, [half_box], variable_set=variable_set)
    return full, mirror_slice_through_z0(half)


def test_half_grid_kerr_and_brill_lindquist_give_the_full_grid_surfaces():
    from penumbra_server.numerics.finder import FinderSettings, find_surface
    from penumbra_server.numerics.measures import measure_surface
    from penumbra_server.numerics.spacetimes import BrillLindquist, KerrKerrSchild
    from penumbra_server.numerics.surfaces import Surface

    # Kerr a = 0.6 with the spin along z (odd K_xz, K_yz, shift_z) and an equal-mass
    # Brill-Lindquist pair in the z = 0 plane (individual and common surfaces).
    kerr = KerrKerrSchild(mass=1.0, spin=0.6, axis=np.array([0.0, 0.0, 1.0]), centre=np.zeros(3))
    pair = BrillLindquist(masses=np.array([0.5, 0.5]), positions=np.array([[0.3, 0.0, 0.0], [-0.3, 0.0, 0.0]]))
    cases = [
        (kerr, 2.6, 0.1, "adm", [Surface.sphere([0.0, 0.0, 0.0], 2.0, 8)]),
        (pair, 1.3, 0.05, "conformal_w", [Surface.sphere([0.0, 0.0, 0.0], 0.7, 8), Surface.sphere([0.3, 0.0, 0.0], 0.2, 8)]),
    ]
    for spacetime, half_width, spacing, vs, guesses in cases:
        full, mirrored = _half_and_full(spacetime, half_width, spacing, vs)
        for guess in guesses:
            a = find_surface(full, guess, settings=FinderSettings(lmax=8))
            b = find_surface(mirrored, guess, settings=FinderSettings(lmax=8))
            assert a.success and b.success, (a.message, b.message)
            np.testing.assert_allclose(b.surface.coefficients, a.surface.coefficients, atol=1e-10)
            qa, qb = measure_surface(a.surface, full), measure_surface(b.surface, mirrored)
            assert qb.area == pytest.approx(qa.area, rel=1e-11)
            assert qb.circumference_xz == pytest.approx(qa.circumference_xz, rel=1e-10)
