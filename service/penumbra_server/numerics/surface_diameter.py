"""The smallest coordinate diameter of a star-shaped surface through its expansion centre.

Units: lengths in M. Used by the refinement guidance (a horizon needs enough points across its
narrowest direction) and by the steering's per-surface state.
"""

from __future__ import annotations

import functools

import numpy as np

from .surfaces import Surface, degree_of_index, harmonic_values

__all__ = ["smallest_diameter"]


def smallest_diameter(surface: Surface, *, samples: int | None = None) -> float:
    """Smallest coordinate diameter h(n) + h(-n) of a star-shaped surface through its centre, M.

    For real harmonics Y_lm(-n) = (-1)^l Y_lm(n), so h(n) + h(-n) = 2 sum over even l of
    a_lm Y_lm(n); it is minimised over a grid of ``samples`` x 2 ``samples`` directions
    (default 4 (l_max + 2)).
    """
    values = _direction_values(surface.lmax, int(samples or 4 * (surface.lmax + 2)))
    even = (degree_of_index(surface.lmax) % 2 == 0).astype(float)
    return float(np.min(2.0 * values @ (surface.coefficients * even)))


@functools.lru_cache(maxsize=16)
def _direction_values(lmax: int, n_theta: int) -> np.ndarray:
    """Real harmonics up to ``lmax`` on the n_theta x 2 n_theta direction grid, shape
    (2 n_theta^2, (lmax + 1)^2), read-only: a constant of (lmax, n_theta), built once (the
    server's apply step calls this for every surface found)."""
    theta = (np.arange(n_theta) + 0.5) * np.pi / n_theta
    phi = (np.arange(2 * n_theta) + 0.5) * np.pi / n_theta
    tt, pp = np.meshgrid(theta, phi, indexing="ij")
    values = harmonic_values(lmax, tt.ravel(), pp.ravel())
    values.flags.writeable = False
    return values
