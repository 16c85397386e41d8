"""Synthetic tracks for the tracking tests.

Quasi-circular inspiral at leading order (Peters, Phys. Rev. 136, B1224 (1964); docs/references.md
item 14), G = c = 1:
    da/dt = -(64/5) m1 m2 (m1 + m2) / a^3,   omega^2 = (m1 + m2) / a^3.
Integrated in closed form: a(t)^4 = a0^4 - 4 beta t with beta = (64/5) m1 m2 M, and
dphi/da = omega / (da/dt) gives phi(t) = (2/5) sqrt(M) / beta (a0^(5/2) - a(t)^(5/2)).
Body 1 sits at +(m2/M) a (cos phi, sin phi, 0) and body 2 at -(m1/M) a (...) about the centre
of mass; an optional rotation tilts the orbital plane and a velocity moves the centre of mass.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class PetersInspiral:
    m1: float
    m2: float
    a0: float = 12.0
    rotation: np.ndarray = None  # (3, 3) orbital-plane rotation, identity when None
    cm_velocity: np.ndarray = None  # (3,) centre-of-mass drift, zero when None

    @property
    def total_mass(self) -> float:
        return self.m1 + self.m2

    @property
    def beta(self) -> float:
        return 64.0 / 5.0 * self.m1 * self.m2 * self.total_mass

    def separation(self, t) -> np.ndarray:
        a4 = self.a0**4 - 4.0 * self.beta * np.asarray(t, float)
        if np.any(a4 <= 0):
            raise ValueError("time beyond coalescence of the leading-order inspiral")
        return a4**0.25

    def time_at_separation(self, a: float) -> float:
        return (self.a0**4 - a**4) / (4.0 * self.beta)

    def orbital_frequency(self, t) -> np.ndarray:
        return np.sqrt(self.total_mass / self.separation(t) ** 3)

    def phase(self, t) -> np.ndarray:
        a = self.separation(t)
        return 0.4 * np.sqrt(self.total_mass) / self.beta * (self.a0**2.5 - a**2.5)

    def positions(self, t) -> tuple[np.ndarray, np.ndarray]:
        """(n, 3) positions of body 1 and body 2 at times t (n,)."""
        t = np.atleast_1d(np.asarray(t, float))
        a, phi = self.separation(t), self.phase(t)
        rel = a[:, None] * np.stack([np.cos(phi), np.sin(phi), np.zeros_like(phi)], axis=1)
        rot = np.eye(3) if self.rotation is None else np.asarray(self.rotation, float)
        rel = rel @ rot.T
        cm = np.zeros((t.size, 3)) if self.cm_velocity is None else t[:, None] * np.asarray(self.cm_velocity, float)
        M = self.total_mass
        return cm + (self.m2 / M) * rel, cm - (self.m1 / M) * rel


def mass_ratio_pair(q: float) -> tuple[float, float]:
    """Masses (m1, m2) with m1 / m2 = q and m1 + m2 = 1."""
    return q / (1.0 + q), 1.0 / (1.0 + q)
