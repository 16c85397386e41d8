"""Tracking through skipped slices, the pure parts: the metric's peaks mark the punctures, and
the uncertainty and relocation radius grow with the elapsed time and the misses."""

from __future__ import annotations

import numpy as np
import pytest

from penumbra_server.numerics.body_peaks import conformal_peaks, volume_factor
from penumbra_server.numerics.slices import Patch, Slice, VariableSet
from penumbra_server.numerics.spacetimes import BrillLindquist, sample_patch
from penumbra_server.tracking.skipping import grown_uncertainty, is_skip, moves_far, relocation_radius, usual_spacing

MASSES = (0.6, 0.4)
PUNCTURES = np.array([[0.31, 0.12, 0.013], [-0.52, -0.2, 0.013]])


def _slice(variable_set: str, spacing: float = 0.05, half: float = 1.2) -> Slice:
    n = int(round(2 * half / spacing)) + 1
    origin = (-half + 0.011, -half + 0.007, -half + 0.003)  # no node on a puncture
    p = sample_patch(BrillLindquist(np.asarray(MASSES), PUNCTURES), origin=origin, spacing=(spacing,) * 3,
                     shape=(n, n, n), level=0, variable_set=variable_set)
    patch = Patch(origin=np.asarray(origin), spacing=np.full(3, spacing), shape=(n, n, n), level=0, fields=p.fields)
    return Slice(time=0.0, iteration=0, variable_set=VariableSet(variable_set), patches=(patch,))


@pytest.mark.parametrize("variable_set", ["adm", "conformal_w"])
def test_the_volume_factor_peaks_at_the_node_nearest_each_puncture(variable_set):
    s = _slice(variable_set)
    peaks = conformal_peaks(s, (0.0, 0.0, 0.0), 1.0, min_separation=0.1)
    assert len(peaks) == 2
    h = 0.05
    for peak in peaks:
        distances = np.linalg.norm(PUNCTURES - np.asarray(peak.position), axis=1)
        # Within one node diagonal of a puncture (sqrt(3) h): the nearest node to it, or beside it.
        assert distances.min() <= np.sqrt(3) * h
    # Flat space far away: psi^4 = (1 + sum m / 2r)^4 by construction of Brill-Lindquist data
    # (Brill & Lindquist, Phys. Rev. 131, 471 (1963)): check one node against that formula.
    patch = s.patches[0]
    q = volume_factor(patch.fields, s.variable_set)
    x = patch.origin + 3 * patch.spacing
    psi = 1.0 + sum(m / (2 * np.linalg.norm(x - p)) for m, p in zip(MASSES, PUNCTURES))
    assert q[3, 3, 3] == pytest.approx(psi ** 4, rel=1e-10)


def test_peaks_outside_the_ball_are_not_returned_and_a_bad_radius_is_refused():
    s = _slice("adm")
    near_heavy = conformal_peaks(s, PUNCTURES[0], 0.3, min_separation=0.1)
    assert len(near_heavy) == 1 and np.linalg.norm(np.asarray(near_heavy[0].position) - PUNCTURES[0]) < 0.1
    with pytest.raises(ValueError, match="radius"):
        conformal_peaks(s, PUNCTURES[0], 0.0, min_separation=0.1)


def test_uncertainty_and_radius_grow_with_elapsed_time_and_misses():
    assert np.isnan(usual_spacing([1.0])) and usual_spacing([0.0, 0.2, 0.4, 1.4]) == pytest.approx(0.2)
    assert is_skip(1.0, 0.2) and not is_skip(0.2, 0.2) and is_skip(0.2, float("nan")) and not is_skip(0.0, 0.2)
    assert moves_far(0.5, 1.0, 0.3) and not moves_far(0.1, 1.0, 0.3)
    # One sample: no speed known, the speed of light times the gap.
    assert grown_uncertainty(float("inf"), speed=0.0, samples=1, elapsed=2.0) == pytest.approx(2.0)
    # Several: 1.5 x speed x elapsed, or the forecast's own estimate if larger.
    assert grown_uncertainty(0.01, speed=0.4, samples=5, elapsed=1.0) == pytest.approx(0.6)
    assert grown_uncertainty(0.9, speed=0.4, samples=5, elapsed=1.0) == pytest.approx(0.9)
    widths = [relocation_radius(0.3, 0.6, misses=k, cap=10.0) for k in range(4)]
    assert widths[0] == pytest.approx(1.6 * 0.3 + 0.6) and np.all(np.diff(widths) > 0)
    assert relocation_radius(0.3, 100.0, misses=0, cap=3.6) == 3.6
