"""The remnant's settled values from synthetic ringdown-like series: constants plus an
exponentially damped sinusoid (the shape of quasinormal ringing; damping time 12 M, about that of
the least-damped quadrupole mode of a chi ~ 0.7 remnant, docs/references.md item 20, from memory)."""

import numpy as np
import pytest

from penumbra_server.tracking.remnant import RemnantError, remnant

FINAL = dict(irreducible_mass=0.884, christodoulou_mass=0.951, dimensionless_spin=0.686,
             spin_vector=np.array([0.02, -0.01, 0.62]))
TAU, OMEGA = 12.0, 0.53  # M, 1/M


def ringdown(t_end, *, amplitude=0.03, error=1e-4, dt=0.5):
    t = np.arange(0.0, t_end + 1e-9, dt)
    ring = amplitude * np.exp(-t / TAU) * np.sin(OMEGA * t)
    values = {k: (v + ring if np.ndim(v) == 0 else v + ring[:, None] * np.array([0.3, 0.1, 1.0]))
              for k, v in FINAL.items()}
    errors = {k: np.full(np.shape(v), error) for k, v in values.items()}
    return t, values, errors


def test_ringing_series_is_not_settled_and_says_by_how_much():
    t, values, errors = ringdown(40.0)  # 0.03 e^(-30/12) ~ 2.5e-3 still ringing in the window
    r = remnant(t, values, errors, window=10.0)
    assert not r.settled
    assert not r.dimensionless_spin.settled and r.dimensionless_spin.ratio > 5
    assert r.window == (30.0, 40.0) and r.samples == 21
    assert "1 error bar" in r.criterion


def test_late_series_is_settled_at_the_final_values():
    t, values, errors = ringdown(200.0)  # 0.03 e^(-190/12) ~ 4e-9
    r = remnant(t, values, errors, window=10.0)
    assert r.settled
    for name, final in FINAL.items():
        q = getattr(r, name)
        assert q.settled and q.spread < 1e-6 and q.drift < 1e-6
        np.testing.assert_allclose(q.value, final, atol=1e-6)
        np.testing.assert_allclose(q.error, 1e-4)


def test_settling_time_matches_the_damping():
    # The spread over a 10 M window first drops below one error bar (1e-4) when the ringing amplitude
    # there is below it: 0.03 e^(-(t - 10)/12) ~ 1e-4 at t ~ 78 M (the sine's phase moves it a little).
    settled_at = None
    for t_end in np.arange(20.0, 140.0, 2.0):
        t, values, errors = ringdown(t_end)
        if remnant(t, values, errors).dimensionless_spin.settled:
            settled_at = t_end
            break
    assert settled_at is not None and 60.0 <= settled_at <= 85.0


def test_too_short_or_sparse_series_is_not_settled():
    t, values, errors = ringdown(6.0, amplitude=0.0)  # constant, but shorter than the window
    r = remnant(t, values, errors, window=10.0)
    assert not r.settled and "NOT covered" in r.criterion
    t, values, errors = ringdown(40.0, amplitude=0.0, dt=4.0)  # 3 samples in the window
    assert not remnant(t, values, errors, window=10.0, min_samples=5).settled
    assert remnant(t, values, errors, window=10.0, min_samples=3).settled


def test_bad_input_is_named():
    t, values, errors = ringdown(20.0)
    with pytest.raises(RemnantError, match="times"):
        remnant(t[::-1], values, errors)
    with pytest.raises(RemnantError, match="spin_vector"):
        remnant(t, dict(values, spin_vector=values["spin_vector"][:, :2]), errors)
    with pytest.raises(RemnantError, match="errors"):
        remnant(t, values, {k: v for k, v in errors.items() if k != "christodoulou_mass"})
    with pytest.raises(RemnantError, match="window"):
        remnant(t, values, errors, window=0.0)
    with pytest.raises(RemnantError, match="dimensionless_spin"):
        remnant(t, values, dict(errors, dimensionless_spin=-errors["dimensionless_spin"]))
