"""The slice model: a time, an iteration and vertex-centred uniform patches of field data.

Conventions (geometric units G = c = 1, lengths in the run's mass scale M):

* A patch is a vertex-centred uniform box. ``origin`` is the coordinate position of the node
  with index ``[0, 0, 0]``, ``spacing`` is ``(dx, dy, dz)`` and ``shape`` is ``(nx, ny, nz)``;
  node ``[i, j, k]`` sits at ``origin + (i dx, j dy, k dz)``.
* Every field array is indexed ``[i, j, k]`` (x index first) whatever its memory layout.
  ``memory_order`` records how a flat buffer was laid out ("C": k fastest, "F": i fastest)
  and matters only when a patch is built from flat buffers (:meth:`Patch.from_flat`).
* Where patches overlap, data from the highest refinement ``level`` wins.
* Excised regions (``Slice.excised_spheres`` and a patch's ``excision_mask`` field, see
  :mod:`penumbra_server.numerics.excision`) hold no data: NaN is allowed there and nothing reads it.

Field names are spelled after the symbols (see :data:`ADM_FIELDS`, :func:`required_fields`).
"""

from __future__ import annotations

import enum
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from .excision import EXCISION_MASK_FIELD, ExcisedSphere, excised_node_mask

__all__ = [
    "SliceError",
    "DegenerateMetricError",
    "VariableSet",
    "Patch",
    "Slice",
    "SYMMETRIC_SUFFIXES",
    "SYMMETRIC_INDEX_PAIRS",
    "ADM_FIELDS",
    "required_fields",
    "optional_fields",
    "symmetric_field_names",
]

#: Suffixes of the six independent components of a symmetric 3-tensor, in storage order.
SYMMETRIC_SUFFIXES: tuple[str, ...] = ("xx", "xy", "xz", "yy", "yz", "zz")
#: The (i, j) index pair of each suffix in :data:`SYMMETRIC_SUFFIXES`.
SYMMETRIC_INDEX_PAIRS: tuple[tuple[int, int], ...] = ((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2))


def symmetric_field_names(stem: str) -> tuple[str, ...]:
    """The six component names of a symmetric tensor field, e.g. ``gamma_xx .. gamma_zz``."""
    return tuple(f"{stem}_{s}" for s in SYMMETRIC_SUFFIXES)


class SliceError(ValueError):
    """A slice or patch does not satisfy the model. The message names the field at fault."""


class DegenerateMetricError(SliceError):
    """Finite data whose spatial metric is not positive definite (e.g. all zero or negative
    definite) where a surface needs it."""


class VariableSet(str, enum.Enum):
    """Which set of evolved variables a slice carries.

    ``ADM``: spatial metric ``gamma_ij`` and extrinsic curvature ``K_ij``.
    ``CONFORMAL_CHI`` / ``CONFORMAL_W`` / ``CONFORMAL_PHI``: BSSN-style conformal variables with
    the conformal factor given as ``chi`` (gamma_ij = gamma_tilde_ij / chi), ``W``
    (chi = W^2) or ``phi`` (chi = exp(-4 phi)); plus ``gamma_tilde_ij``, the trace-free
    ``A_tilde_ij`` and ``trace_K``, so that K_ij = (A_tilde_ij + gamma_tilde_ij trace_K / 3) / chi.
    """

    ADM = "adm"
    CONFORMAL_CHI = "conformal_chi"
    CONFORMAL_W = "conformal_w"
    CONFORMAL_PHI = "conformal_phi"

    @property
    def conformal_factor_name(self) -> str | None:
        """Name of the conformal-factor field, or None for ADM."""
        return {
            VariableSet.ADM: None,
            VariableSet.CONFORMAL_CHI: "chi",
            VariableSet.CONFORMAL_W: "W",
            VariableSet.CONFORMAL_PHI: "phi",
        }[self]

    @classmethod
    def parse(cls, value: "VariableSet | str") -> "VariableSet":
        """Accept an enum member or its string value; raise :class:`SliceError` otherwise."""
        if isinstance(value, VariableSet):
            return value
        try:
            return cls(str(value))
        except ValueError:
            allowed = ", ".join(v.value for v in cls)
            raise SliceError(f"variable_set: unknown value {value!r}; expected one of {allowed}") from None


#: Fields of the ADM variable set, in a fixed order.
ADM_FIELDS: tuple[str, ...] = symmetric_field_names("gamma") + symmetric_field_names("K")

_GAUGE_FIELDS: tuple[str, ...] = ("lapse", "shift_x", "shift_y", "shift_z")


def required_fields(variable_set: VariableSet | str) -> tuple[str, ...]:
    """Names of the fields a slice of this variable set must carry on every patch."""
    vs = VariableSet.parse(variable_set)
    if vs is VariableSet.ADM:
        return ADM_FIELDS
    return (
        (vs.conformal_factor_name,)
        + symmetric_field_names("gamma_tilde")
        + symmetric_field_names("A_tilde")
        + ("trace_K",)
    )


def optional_fields(variable_set: VariableSet | str) -> tuple[str, ...]:
    """Gauge fields a slice may carry (used for puncture tracking, not for finding)."""
    VariableSet.parse(variable_set)
    return _GAUGE_FIELDS


def _as_triple(value, name: str, *, dtype=float) -> np.ndarray:
    arr = np.asarray(value, dtype=dtype)
    if arr.shape != (3,):
        raise SliceError(f"{name}: expected three numbers (x, y, z), got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise SliceError(f"{name}: expected finite numbers, got {arr.tolist()}")
    return arr


@dataclass(frozen=True, eq=False)
class Patch:
    """One vertex-centred uniform box of field data.

    Attributes:
        origin: (3,) coordinate position of node [0, 0, 0], units of M.
        spacing: (3,) node spacing (dx, dy, dz) > 0, units of M.
        shape: (nx, ny, nz), at least 2 nodes along each axis.
        level: refinement level; higher is finer and wins where patches overlap.
        fields: name -> float64 array of shape ``shape`` indexed [i, j, k].
        memory_order: "C" or "F", the layout the data was declared with.
    """

    origin: np.ndarray
    spacing: np.ndarray
    shape: tuple[int, int, int]
    level: int
    fields: Mapping[str, np.ndarray]
    memory_order: str = "C"

    def __post_init__(self) -> None:
        origin = _as_triple(self.origin, "origin")
        spacing = _as_triple(self.spacing, "spacing")
        if np.any(spacing <= 0):
            raise SliceError(f"spacing: every component must be > 0, got {spacing.tolist()}")
        try:
            shape = tuple(int(n) for n in self.shape)
        except (TypeError, ValueError):
            raise SliceError(f"shape: expected three integers, got {self.shape!r}") from None
        if len(shape) != 3 or min(shape) < 2:
            raise SliceError(f"shape: expected three integers >= 2, got {self.shape!r}")
        if self.memory_order not in ("C", "F"):
            raise SliceError(f"memory_order: expected 'C' or 'F', got {self.memory_order!r}")
        checked: dict[str, np.ndarray] = {}
        for name, data in self.fields.items():
            arr = np.asarray(data)
            if arr.shape != shape:
                raise SliceError(
                    f"field {name!r}: array shape {arr.shape} does not match patch shape {shape}"
                )
            if not np.issubdtype(arr.dtype, np.floating):
                raise SliceError(f"field {name!r}: expected floating-point data, got dtype {arr.dtype}")
            checked[name] = arr
        object.__setattr__(self, "origin", origin)
        object.__setattr__(self, "spacing", spacing)
        object.__setattr__(self, "shape", shape)
        object.__setattr__(self, "level", int(self.level))
        object.__setattr__(self, "fields", checked)

    @classmethod
    def from_flat(
        cls,
        *,
        origin,
        spacing,
        shape,
        level: int,
        buffers: Mapping[str, np.ndarray | bytes],
        memory_order: str = "C",
        dtype=np.float64,
    ) -> "Patch":
        """Build a patch from flat buffers laid out in ``memory_order`` (no copy where possible)."""
        if memory_order not in ("C", "F"):
            raise SliceError(f"memory_order: expected 'C' or 'F', got {memory_order!r}")
        shape = tuple(int(n) for n in shape)
        count = int(np.prod(shape))
        fields = {}
        for name, buf in buffers.items():
            flat = np.frombuffer(buf, dtype=dtype) if isinstance(buf, (bytes, bytearray, memoryview)) else np.asarray(buf)
            if flat.size != count:
                raise SliceError(
                    f"field {name!r}: {flat.size} values do not fill patch shape {shape} ({count} values)"
                )
            fields[name] = flat.reshape(shape, order=memory_order)
        return cls(origin=origin, spacing=spacing, shape=shape, level=level, fields=fields,
                   memory_order=memory_order)

    @property
    def upper(self) -> np.ndarray:
        """(3,) coordinate position of the last node."""
        return self.origin + self.spacing * (np.asarray(self.shape) - 1)

    def node_coordinates(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The 1-D node coordinates along x, y and z."""
        return tuple(self.origin[a] + self.spacing[a] * np.arange(self.shape[a]) for a in range(3))


@dataclass(frozen=True, eq=False)
class Slice:
    """A 3+1 slice: coordinate time, iteration number, variable set and patches.

    Attributes:
        time: coordinate time t, units of M.
        iteration: the evolution's iteration number (an identifier, not a time).
        variable_set: which fields the patches carry (:class:`VariableSet`).
        patches: tuple of :class:`Patch`; every patch carries all required fields.
        excised_spheres: the run's declared :class:`ExcisedSphere` s (units of M); with the
            patches' ``excision_mask`` fields they mark the nodes that hold no data.
    """

    time: float
    iteration: int
    variable_set: VariableSet
    patches: tuple[Patch, ...] = field(default_factory=tuple)
    excised_spheres: tuple[ExcisedSphere, ...] = ()

    def __post_init__(self) -> None:
        vs = VariableSet.parse(self.variable_set)
        object.__setattr__(self, "variable_set", vs)
        if not np.isfinite(float(self.time)):
            raise SliceError(f"time: expected a finite number, got {self.time!r}")
        object.__setattr__(self, "time", float(self.time))
        object.__setattr__(self, "iteration", int(self.iteration))
        patches = tuple(self.patches)
        if not patches:
            raise SliceError("patches: a slice needs at least one patch")
        needed = required_fields(vs)
        for index, patch in enumerate(patches):
            if not isinstance(patch, Patch):
                raise SliceError(f"patches[{index}]: expected a Patch, got {type(patch).__name__}")
            missing = [name for name in needed if name not in patch.fields]
            if missing:
                raise SliceError(
                    f"patches[{index}]: missing field(s) {', '.join(missing)} required by variable set "
                    f"{vs.value!r}"
                )
        object.__setattr__(self, "patches", patches)
        spheres = tuple(self.excised_spheres)
        for index, sphere in enumerate(spheres):
            if not isinstance(sphere, ExcisedSphere):
                raise SliceError(f"excised_spheres[{index}]: expected an ExcisedSphere, got {type(sphere).__name__}")
        object.__setattr__(self, "excised_spheres", spheres)

    def excised_mask(self, index: int, window: tuple[slice, slice, slice] | None = None) -> np.ndarray | None:
        """Boolean mask of the excised nodes of ``patches[index]`` (of its sub-box ``window``
        when given), or None when neither spheres nor that patch's mask are declared."""
        patch = self.patches[index]
        return excised_node_mask(patch.origin, patch.spacing, patch.shape, self.excised_spheres,
                                 patch.fields.get(EXCISION_MASK_FIELD), window)

    def patch_order(self) -> list[int]:
        """Patch indices, finest level first (ties keep the given order)."""
        return sorted(range(len(self.patches)), key=lambda i: -self.patches[i].level)

    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """(lower, upper) corners of the box holding every patch."""
        lo = np.min([p.origin for p in self.patches], axis=0)
        hi = np.max([p.upper for p in self.patches], axis=0)
        return lo, hi

    def nbytes(self) -> int:
        """Bytes of field data carried by the slice."""
        return int(sum(a.nbytes for p in self.patches for a in p.fields.values()))

    def check_finite(self, names: Sequence[str] | None = None) -> None:
        """Raise :class:`SliceError` naming the first field and node holding NaN or infinity
        outside the declared excised regions (the ``excision_mask`` itself must be finite)."""
        for index, patch in enumerate(self.patches):
            excised = None
            for name in names or patch.fields.keys():
                arr = patch.fields[name]
                bad = ~np.isfinite(arr)
                if bad.any() and name != EXCISION_MASK_FIELD:
                    if excised is None:  # only built when needed: most slices are finite throughout
                        excised = self.excised_mask(index)
                        excised = np.zeros(patch.shape, bool) if excised is None else excised
                    bad &= ~excised
                if bad.any():
                    where = tuple(int(v) for v in np.argwhere(bad)[0])
                    raise SliceError(
                        f"field {name!r} on patches[{index}] (level {patch.level}): {int(bad.sum())} "
                        f"non-finite value(s), first at node {list(where)}; expected finite numbers"
                    )
