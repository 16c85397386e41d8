"""The worker's measurement of what a practitioner quotes never loses a found surface: a part that
cannot be measured leaves NaN and a note (server/jobs.py)."""

from __future__ import annotations

import math

import pytest

import numpy as np

from penumbra_server.numerics.finder import FinderSettings, find_surface
from penumbra_server.numerics.spacetimes import KerrKerrSchild, SchwarzschildIsotropic
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
