"""Where the bodies are in a slice, read off the metric: peaks of the conformal factor.

Near a black hole the spatial metric's volume element det(gamma_ij) grows steeply (at a puncture
it diverges; psi^4 = det(gamma_ij)^(1/3) for conformally flat data; common practice in locating
punctures is the minimum of the conformal variable chi or W). The nodes where
q = det(gamma_ij)^(1/3) has a local maximum therefore mark candidate body centres, whatever the
gauge. A tracker that lost a body (its forecast too uncertain after skipped slices) uses them
as the centres of its sphere scans: a scan about a point outside the horizon finds no sign
change of the expansion, one about a point inside finds the horizon.

Pure function of the slice's arrays; units: G = c = 1, lengths in M.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .slices import Slice, VariableSet

__all__ = ["BodyPeak", "conformal_peaks", "volume_factor"]


@dataclass(frozen=True)
class BodyPeak:
    """One local maximum of q = det(gamma_ij)^(1/3): node position (3,) in M, value, patch level."""

    position: tuple[float, float, float]
    value: float
    level: int


def volume_factor(fields, variable_set: VariableSet) -> np.ndarray:
    """q = det(gamma_ij)^(1/3) on a patch's nodes (dimensionless; 1 for flat space), shape of the fields."""
    vs = VariableSet.parse(variable_set)
    if vs is VariableSet.ADM:
        g = {s: np.asarray(fields[f"gamma_{s}"], float) for s in ("xx", "xy", "xz", "yy", "yz", "zz")}
        scale = 1.0
    else:
        g = {s: np.asarray(fields[f"gamma_tilde_{s}"], float) for s in ("xx", "xy", "xz", "yy", "yz", "zz")}
        c = np.asarray(fields[vs.conformal_factor_name], float)
        chi = {VariableSet.CONFORMAL_CHI: lambda: c, VariableSet.CONFORMAL_W: lambda: c * c,
               VariableSet.CONFORMAL_PHI: lambda: np.exp(-4.0 * c)}[vs]()
        with np.errstate(divide="ignore", invalid="ignore"):
            scale = 1.0 / chi
    det = (g["xx"] * (g["yy"] * g["zz"] - g["yz"] ** 2) - g["xy"] * (g["xy"] * g["zz"] - g["yz"] * g["xz"])
           + g["xz"] * (g["xy"] * g["yz"] - g["yy"] * g["xz"]))
    with np.errstate(invalid="ignore"):
        q = np.cbrt(det) * scale
    return np.where(np.isfinite(q) & (q > 0), q, np.nan)


def _local_maxima(q: np.ndarray) -> np.ndarray:
    """Boolean mask of interior nodes not below any of their 26 neighbours (NaN never a maximum)."""
    mask = np.zeros(q.shape, bool)
    if min(q.shape) < 3:
        return mask
    core = q[1:-1, 1:-1, 1:-1]
    keep = np.isfinite(core)
    n = q.shape
    for di in (-1, 0, 1):
        for dj in (-1, 0, 1):
            for dk in (-1, 0, 1):
                if di == dj == dk == 0:
                    continue
                other = q[1 + di:n[0] - 1 + di, 1 + dj:n[1] - 1 + dj, 1 + dk:n[2] - 1 + dk]
                keep &= ~(other > core)
    mask[1:-1, 1:-1, 1:-1] = keep
    return mask


def conformal_peaks(slice_: Slice, centre, radius: float, *, min_separation: float,
                    max_peaks: int = 6) -> tuple[BodyPeak, ...]:
    """Local maxima of q = det(gamma_ij)^(1/3) within ``radius`` (M) of ``centre`` (3,).

    Peaks of different patches closer than ``min_separation`` (M) are one body: the one of the
    finest level (then the larger value) is kept. Returns at most ``max_peaks`` peaks, largest
    value first. Excised nodes are ignored.
    """
    centre = np.asarray(centre, float).reshape(3)
    if not (np.isfinite(radius) and radius > 0):
        raise ValueError(f"radius: expected a positive length in M, got {radius!r}")
    found: list[BodyPeak] = []
    for index, patch in enumerate(slice_.patches):
        lo, hi = patch.origin, patch.upper
        if np.any(lo > centre + radius) or np.any(hi < centre - radius):
            continue
        q = volume_factor(patch.fields, slice_.variable_set)
        excised = slice_.excised_mask(index)
        if excised is not None:
            q = np.where(excised, np.nan, q)
        idx = np.argwhere(_local_maxima(q))
        if idx.size == 0:
            continue
        pos = patch.origin + idx * patch.spacing
        near = np.linalg.norm(pos - centre, axis=1) <= radius
        for p, ijk in zip(pos[near], idx[near]):
            found.append(BodyPeak(tuple(float(v) for v in p), float(q[tuple(ijk)]), int(patch.level)))
    found.sort(key=lambda b: (-b.level, -b.value))
    kept: list[BodyPeak] = []
    for peak in found:
        if all(np.linalg.norm(np.subtract(peak.position, k.position)) >= min_separation for k in kept):
            kept.append(peak)
    kept.sort(key=lambda b: -b.value)
    return tuple(kept[:max_peaks])
