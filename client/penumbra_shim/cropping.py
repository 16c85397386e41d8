"""Crop grid patches to the data windows the server asked for.

A patch is a vertex-centred uniform box: node [i, j, k] sits at origin + (i dx, j dy, k dz),
every field array is indexed [i, j, k]. Cropping keeps whole nodes of the original lattice:
the cropped patch has the same spacing, an origin on an original node, and holds every node
of the original patch that lies inside a window, plus the nodes just outside it needed to
enclose the window (the last node at or below the window's lower corner and the first at or
above its upper corner), plus ``extra_nodes`` more on every side, clipped to the patch. Field
values are copied unchanged.

Windows are valid for slices with times in [valid_from, valid_until]. A slice sent after they
expired (the server lags behind the evolution) is cropped to the windows grown by
:func:`grow_expired_windows`: each window widened on every side by the distance the bodies can
have moved since, ``min(speed_bound * (t - valid_until), growth_cap)`` with the speed bound and
cap the server states with its windows. It goes whole only when the grown crop would keep
nearly all of it (:data:`NEARLY_WHOLE_FRACTION` of the bytes, see :func:`worth_cropping`).

This module needs numpy and the shim's error classes only, so an evolution code can crop without
the server installed.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from ._errors import CropError

__all__ = ["CropError", "CroppedPatch", "WindowGrowth", "crop_index_box", "crop_patches", "grow_expired_windows",
           "worth_cropping", "NEARLY_WHOLE_FRACTION"]

#: A crop to grown windows that keeps at least this fraction of the slice's bytes is not worth
#: it: the slice goes whole (the server then also gets everything around the windows).
NEARLY_WHOLE_FRACTION = 0.9


@dataclass(frozen=True, eq=False)
class CroppedPatch:
    """A patch cut out of a larger one.

    Attributes:
        origin: (3,) coordinates of the cropped patch's node [0, 0, 0], units of M.
        spacing: (3,) node spacing, as the source patch.
        shape: (nx, ny, nz) nodes.
        fields: name -> array of ``shape`` (a copy; the same memory layout as the source).
        level: refinement level of the source patch.
        source_index: index of the source patch in the input sequence.
        index_offset: (3,) index in the source patch of the cropped node [0, 0, 0].
        memory_order: "C" or "F", as declared for the source patch.
    """

    origin: np.ndarray
    spacing: np.ndarray
    shape: tuple[int, int, int]
    fields: Mapping[str, np.ndarray]
    level: int
    source_index: int
    index_offset: tuple[int, int, int]
    memory_order: str = "C"

    @property
    def upper(self) -> np.ndarray:
        """(3,) coordinates of the last node."""
        return self.origin + self.spacing * (np.asarray(self.shape) - 1)

    def nbytes(self) -> int:
        return int(sum(a.nbytes for a in self.fields.values()))


def _get(patch, key: str, index: int, default=None, required=True):
    if isinstance(patch, Mapping):
        if key in patch:
            return patch[key]
    elif hasattr(patch, key):
        return getattr(patch, key)
    if required:
        raise CropError(f"patches[{index}]: missing {key!r} (expected origin, spacing, shape, fields)")
    return default


def _windows(windows) -> np.ndarray:
    """Normalise windows to an (m, 2, 3) array of (lower, upper)."""
    if isinstance(windows, np.ndarray):
        arr = np.asarray(windows, float)
    else:
        rows = []
        for index, w in enumerate(windows):
            if hasattr(w, "lower") and hasattr(w, "upper"):
                rows.append([np.asarray(w.lower, float), np.asarray(w.upper, float)])
            else:
                try:
                    lower, upper = w
                except (TypeError, ValueError):
                    raise CropError(f"windows[{index}]: expected (lower, upper) or an object with "
                                    f".lower and .upper") from None
                rows.append([np.asarray(lower, float), np.asarray(upper, float)])
        arr = np.asarray(rows, float) if rows else np.zeros((0, 2, 3))
    if arr.ndim == 2 and arr.shape == (2, 3):
        arr = arr[None]
    if arr.ndim != 3 or arr.shape[1:] != (2, 3):
        raise CropError(f"windows: expected (lower, upper) pairs of 3-vectors, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)) or np.any(arr[:, 0] > arr[:, 1]):
        raise CropError("windows: expected finite corners with lower <= upper")
    return arr


def crop_index_box(origin, spacing, shape, lower, upper, *, extra_nodes: int = 0):
    """Index range [start, stop) per axis of the nodes enclosing [lower, upper], or None.

    Args:
        origin, spacing, shape: the patch lattice (3 values each).
        lower, upper: (3,) window corners, units of M.
        extra_nodes: nodes added on every side (clipped to the patch).

    Returns:
        ((3,) start, (3,) stop) integer arrays, at least 2 nodes along each axis where the
        patch has them, or None when the window misses the patch.
    """
    origin = np.asarray(origin, float)
    spacing = np.asarray(spacing, float)
    n = np.asarray(shape, int)
    lower = np.asarray(lower, float)
    upper = np.asarray(upper, float)
    patch_upper = origin + spacing * (n - 1)
    # Tolerance: a window corner within 1e-9 of a node counts as on it (floating-point
    # windows computed from the same lattice must not pull in a neighbour node).
    tol = 1e-9
    if np.any(upper < origin - tol * spacing) or np.any(lower > patch_upper + tol * spacing):
        return None
    lo = np.floor((lower - origin) / spacing + tol).astype(int) - int(extra_nodes)
    hi = np.ceil((upper - origin) / spacing - tol).astype(int) + int(extra_nodes)
    lo = np.clip(lo, 0, n - 1)
    hi = np.clip(hi, 0, n - 1)
    # At least two nodes per axis (a patch needs them), extended inside the patch.
    short = hi - lo < 1
    hi = np.where(short, np.minimum(lo + 1, n - 1), hi)
    lo = np.where(short & (hi - lo < 1), np.maximum(hi - 1, 0), lo)
    return lo, hi + 1


def _merge_index_boxes(boxes):
    """Merge index boxes that share nodes into their bounding boxes (no node travels twice)."""
    boxes = [(lo.copy(), hi.copy()) for lo, hi in boxes]
    changed = True
    while changed:
        changed = False
        for i in range(len(boxes)):
            for j in range(i + 1, len(boxes)):
                (lo1, hi1), (lo2, hi2) = boxes[i], boxes[j]
                if np.all(lo1 < hi2) and np.all(lo2 < hi1):
                    boxes[i] = (np.minimum(lo1, lo2), np.maximum(hi1, hi2))
                    del boxes[j]
                    changed = True
                    break
            if changed:
                break
    return boxes


def crop_patches(patches: Sequence, windows, *, extra_nodes: int = 0) -> list[CroppedPatch]:
    """Cut every patch down to the nodes that cover the windows.

    Args:
        patches: objects or mappings with ``origin`` (3,), ``spacing`` (3,), ``shape``
            (nx, ny, nz) and ``fields`` (name -> array of ``shape`` indexed [i, j, k]);
            optional ``level`` (default 0) and ``memory_order`` (default "C").
        windows: (m, 2, 3) array of (lower, upper), a sequence of (lower, upper) pairs, or
            objects with ``.lower`` and ``.upper`` (units of M; the server's margins included).
        extra_nodes: nodes added around each cut, in the patch's own spacing (e.g. for a
            coarser patch's interpolation stencil).

    Returns:
        The cropped patches, in input order; a patch the windows miss yields none, and
        windows overlapping inside one patch yield one cut covering both.
    """
    wins = _windows(windows)
    if int(extra_nodes) < 0:
        raise CropError(f"extra_nodes: expected an integer >= 0, got {extra_nodes!r}")
    out: list[CroppedPatch] = []
    for index, patch in enumerate(patches):
        origin = np.asarray(_get(patch, "origin", index), float)
        spacing = np.asarray(_get(patch, "spacing", index), float)
        shape = tuple(int(v) for v in _get(patch, "shape", index))
        fields = _get(patch, "fields", index, default=None, required=False)
        if fields is None:
            fields = _get(patch, "arrays", index)
        level = int(_get(patch, "level", index, default=0, required=False))
        memory_order = str(_get(patch, "memory_order", index, default="C", required=False))
        if origin.shape != (3,) or spacing.shape != (3,) or len(shape) != 3:
            raise CropError(f"patches[{index}]: origin, spacing and shape must have three entries each")
        if np.any(spacing <= 0) or min(shape) < 1:
            raise CropError(f"patches[{index}]: expected spacing > 0 and shape >= 1, got "
                            f"{spacing.tolist()} and {shape}")
        for name, arr in fields.items():
            if np.shape(arr) != shape:
                raise CropError(f"patches[{index}]: field {name!r} has shape {np.shape(arr)}, "
                                f"expected {shape}")
        boxes = []
        for lower, upper in wins:
            box = crop_index_box(origin, spacing, shape, lower, upper, extra_nodes=int(extra_nodes))
            if box is not None:
                boxes.append(box)
        for lo, hi in _merge_index_boxes(boxes):
            cut = tuple(slice(int(a), int(b)) for a, b in zip(lo, hi))
            # order="K" keeps the source's memory layout (C or Fortran) in the copy.
            new_fields = {name: np.array(np.asarray(arr)[cut], copy=True, order="K")
                          for name, arr in fields.items()}
            out.append(CroppedPatch(
                origin=origin + lo * spacing,
                spacing=spacing.copy(),
                shape=tuple(int(v) for v in hi - lo),
                fields=new_fields,
                level=level,
                source_index=index,
                index_offset=tuple(int(v) for v in lo),
                memory_order=memory_order,
            ))
    return out


@dataclass(frozen=True, eq=False)
class WindowGrowth:
    """Windows grown for a slice later (or earlier) than their validity.

    Attributes:
        bounds: (m, 2, 3) grown (lower, upper) per window, units of M.
        lag: how far the slice's time lies outside [valid_from, valid_until], M (0: inside).
        growth: distance added on every side of every window, M.
        capped: whether the server's growth cap limited ``growth``.
    """

    bounds: np.ndarray
    lag: float
    growth: float
    capped: bool

    @property
    def grown(self) -> bool:
        return self.growth > 0


def grow_expired_windows(windows, *, time: float, valid_from: float, valid_until: float, speed_bound: float,
                         growth_cap: float = 0.0) -> WindowGrowth | None:
    """Windows made for [valid_from, valid_until] grown to serve a slice at ``time``.

    Every window is widened on each side by ``growth = speed_bound * lag``, at most
    ``growth_cap`` when that is > 0, where ``lag`` is how far ``time`` lies outside the validity
    interval (0 inside it: the windows are returned unchanged). The stencil nodes are added by
    the crop itself (``extra_nodes``).

    Args:
        windows: as :func:`crop_patches` takes them (units of M).
        time: the slice's coordinate time, M.
        valid_from, valid_until: the windows' validity, M.
        speed_bound: the bodies' coordinate speed bound, M per M (0: not stated by the server).
        growth_cap: largest growth, M (0: no cap).

    Returns:
        The grown windows, or None when they expired and the server stated no speed bound
        (the slice must then go whole).
    """
    wins = _windows(windows)
    values = {"time": time, "valid_from": valid_from, "valid_until": valid_until, "speed_bound": speed_bound,
              "growth_cap": growth_cap}
    for name, value in values.items():
        if not np.isfinite(float(value)):
            raise CropError(f"{name}: expected a finite number, got {value!r}")
    if float(valid_from) > float(valid_until):
        raise CropError(f"valid_from, valid_until: expected valid_from <= valid_until, got {valid_from!r} and "
                        f"{valid_until!r}")
    if float(speed_bound) < 0 or float(growth_cap) < 0:
        raise CropError(f"speed_bound, growth_cap: expected numbers >= 0, got {speed_bound!r} and {growth_cap!r}")
    # Relative slack so that a slice exactly at valid_until (times rounded on the way) counts as inside.
    slack = 1e-9 * max(1.0, abs(float(valid_until)))
    t = float(time)
    lag = max(0.0, t - float(valid_until) - slack, float(valid_from) - slack - t)
    if lag == 0.0:
        return WindowGrowth(bounds=wins.copy(), lag=0.0, growth=0.0, capped=False)
    if float(speed_bound) <= 0:
        return None
    growth = float(speed_bound) * lag
    capped = float(growth_cap) > 0 and growth > float(growth_cap)
    if capped:
        growth = float(growth_cap)
    grown = wins.copy()
    grown[:, 0] -= growth
    grown[:, 1] += growth
    return WindowGrowth(bounds=grown, lag=lag, growth=growth, capped=capped)


def worth_cropping(cropped_bytes: int, whole_bytes: int, *, fraction: float = NEARLY_WHOLE_FRACTION) -> bool:
    """Whether a crop keeping ``cropped_bytes`` of ``whole_bytes`` saves enough to send it."""
    if not 0 < float(fraction) <= 1:
        raise CropError(f"fraction: expected a number in (0, 1], got {fraction!r}")
    if int(whole_bytes) < 0 or int(cropped_bytes) < 0:
        raise CropError(f"cropped_bytes, whole_bytes: expected numbers >= 0, got {cropped_bytes!r} and {whole_bytes!r}")
    return int(cropped_bytes) < float(fraction) * int(whole_bytes)
