"""The worker's measurement of what a practitioner quotes never loses a found surface: a part that
cannot be measured leaves NaN and a note (server/jobs.py)."""

from __future__ import annotations

import math

import pytest

import numpy as np

from penumbra_server.numerics.finder import FinderSettings, find_surface
from penumbra_server.numerics.spacetimes import BrillLindquist, KerrKerrSchild, SchwarzschildIsotropic, sample_slice
from penumbra_server.numerics.surfaces import Surface
from penumbra_server.server import jobs


def test_unmeasurable_parts_leave_nan_and_a_note():
    kerr = KerrKerrSchild(mass=1.0, spin=0.6)
    # l_max 0 cannot carry the AKV potential (horizon_spin needs l_max >= 1): all spin quantities NaN.
    values, notes = jobs.spin_quantities(Surface.sphere((0.0, 0.0, 0.0), 1.85, 0), kerr, 4)
    assert math.isnan(values["dimensionless_spin"]) and math.isnan(values["akv_angular_momentum"])
    assert all(math.isnan(v) for v in values["mass_multipoles"])
    assert len(notes) == 1 and notes[0].startswith("spin not measured: ValueError")
    # Error bars need l_max >= 3 (compared with l_max - 2): NaN and a note.
    errors, notes = jobs.error_bars(Surface.sphere((0.0, 0.0, 0.0), 1.85, 2), kerr, 4)
    assert set(errors) == {f"{name}_error" for name in jobs.ERROR_BAR_SOURCES}
    assert all(all(math.isnan(x) for x in v) if isinstance(v, list) else math.isnan(v) for v in errors.values())
    assert len(errors["mass_multipoles_error"]) == jobs.MULTIPOLE_N_MAX + 1
    assert len(notes) == 1 and "error bars not estimated" in notes[0] and "l_max >= 3" in notes[0]


def test_measurable_parts_are_measured():
    kerr = KerrKerrSchild(mass=1.0, spin=0.6)
    # Exact data, a sphere near the horizon: every part measures (values finite, no note).
    values, notes = jobs.spin_quantities(Surface.sphere((0.0, 0.0, 0.0), 1.85, 4), kerr, 4)
    assert notes == []
    assert all(math.isfinite(v) for k, v in values.items() if not isinstance(v, list))
    assert len(values["mass_multipoles"]) == jobs.MULTIPOLE_N_MAX + 1


def test_stability_eigenvalue_of_a_schwarzschild_horizon():
    # Time-symmetric Schwarzschild: on the minimal sphere Omega = 0 and chi_AB = 0, so the
    # stability operator is -Lap + R_S / 2 with R_S = 2 / (2M)^2; principal eigenvalue 1 / (4 M^2)
    # (derived in numerics/stability.py's tests; operator of Andersson, Mars & Simon, PRL 95,
    # 111102 (2005), from memory).
    mass = 1.3
    hole = SchwarzschildIsotropic(mass=mass, centre=np.zeros(3))
    found = find_surface(hole, Surface.sphere((0.05, 0.0, 0.0), 0.6 * mass, 6), settings=FinderSettings(lmax=6))
    assert found.success
    values, notes = jobs.stability_quantities(found.surface, hole, 4)
    assert notes == []
    assert values["stability_eigenvalue"] == pytest.approx(1 / (4 * mass**2), rel=1e-6)
    assert 0 <= values["stability_eigenvalue_error"] < 1e-6


def test_unmeasurable_stability_leaves_nan_and_a_note():
    values, notes = jobs.stability_quantities(Surface.sphere((0.0, 0.0, 0.0), 1.0, 4), "not data", 4)
    assert math.isnan(values["stability_eigenvalue"]) and math.isnan(values["stability_eigenvalue_error"])
    assert len(notes) == 1 and notes[0].startswith("stability not computed")


def test_error_bars_start_from_the_spin_measurement_without_making_it_again():
    """The worker measures spin, circumferences and multipoles once: the error bars take that
    measurement (the same numbers their own reference measurement gives) instead of repeating it."""
    hole = BrillLindquist(masses=np.array([1.0]), positions=np.zeros((1, 3)))
    box = dict(origin=(-0.83, -0.81, -0.82), spacing=(0.05,) * 3, shape=(34, 34, 34))
    grid = sample_slice(hole, [box], variable_set="conformal_w")
    found = find_surface(grid, Surface.sphere((0.02, 0.0, 0.0), 0.5, 6),
                         settings=FinderSettings(lmax=6, interpolation_order=4))
    assert found.success
    values, notes, measured = jobs.spin_measurement(found.surface, found.geometry, 4)
    assert notes == [] and measured is not None
    assert measured["area"] == measured["spin"].area and math.isfinite(values["akv_angular_momentum"])
    reused, notes_reused = jobs.error_bars(found.surface, grid, 4, measured)
    again, notes_again = jobs.error_bars(found.surface, grid, 4)
    assert notes_reused == notes_again == []
    for name, value in again.items():
        np.testing.assert_allclose(reused[name], value, rtol=1e-9, atol=1e-13, err_msg=name)
    # And it is used: a reference measurement off by 1e-3 in area moves the area's error bar.
    shifted, _ = jobs.error_bars(found.surface, grid, 4, dict(measured, area=measured["area"] * 1.001))
    assert shifted["area_error"] > 2 * again["area_error"]


def test_a_worker_keeps_freed_memory_in_its_heap():
    """keep_freed_memory (called by every worker's warm-up) sets glibc's allocator to keep freed
    memory: checked in fresh processes by the program break, which a large block then moves
    (allocated in the heap, not mapped) and which freeing it leaves where it is (not trimmed);
    without the call the block is mapped and the break does not move."""
    import subprocess
    import sys

    code = (
        "import ctypes, sys\n"
        "from penumbra_server.server.jobs import keep_freed_memory\n"
        "libc = ctypes.CDLL('libc.so.6')\n"
        "libc.malloc.restype = libc.sbrk.restype = ctypes.c_void_p\n"
        "libc.free.argtypes = [ctypes.c_void_p]; libc.sbrk.argtypes = [ctypes.c_long]\n"
        "kept = keep_freed_memory() if sys.argv[1] == 'keep' else None\n"
        "start = libc.sbrk(0); block = libc.malloc(64 << 20); grown = libc.sbrk(0)\n"
        "libc.free(block); after = libc.sbrk(0)\n"
        "print(kept, grown - start >= 32 << 20, after == grown)\n"
    )

    def run(mode):
        return subprocess.run([sys.executable, "-c", code, mode], capture_output=True, text=True, check=True).stdout.split()

    assert run("keep") == ["True", "True", "True"]
    assert run("default") == ["None", "False", "True"]
