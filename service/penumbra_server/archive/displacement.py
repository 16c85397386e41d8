"""A surface in the normal-displacement representation as archive columns, and back.

Surfaces followed as x = x_ref + h n_ref (the inner common MOTS; numerics/displaced.py) keep that
form in the ``displacement*`` columns of ``surfaces/<label>`` (see the layout): the degrees, h's
coefficients and the reference's coefficients, each in the first rows of its column with NaN
after. Star-shaped surfaces and archives written before these columns read as None.

Importable with numpy only; :meth:`ArchivedDisplacement.surface` builds the numerics object and
so needs the numerics package (scipy).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping

import numpy as np

from . import _layout as layout

__all__ = ["ArchivedDisplacement", "displacement_row", "displacement_from_row"]


def _frozen(values, shape: tuple[int, ...], name: str) -> np.ndarray:
    out = np.array(values, dtype=float)
    if out.size != int(np.prod(shape)):
        raise ValueError(f"{name}: expected {int(np.prod(shape))} values, got {out.size}")
    out = out.reshape(shape)
    out.setflags(write=False)
    return out


@dataclass(frozen=True, eq=False)
class ArchivedDisplacement:
    """One archived surface as x = x_ref + h n_ref.

    Attributes:
        reference_lmax: highest degree of the reference's expansions.
        reference_position: ((reference_lmax + 1)^2, 3) coefficients of x_ref, M.
        reference_direction: ((reference_lmax + 1)^2, 3) coefficients of n_ref, dimensionless.
        lmax: highest degree of h.
        coefficients: ((lmax + 1)^2,) coefficients of h, M.
    """

    reference_lmax: int
    reference_position: np.ndarray
    reference_direction: np.ndarray
    lmax: int
    coefficients: np.ndarray

    def __post_init__(self) -> None:
        rows = (int(self.reference_lmax) + 1) ** 2
        object.__setattr__(self, "reference_position",
                           _frozen(self.reference_position, (rows, 3), "reference_position"))
        object.__setattr__(self, "reference_direction",
                           _frozen(self.reference_direction, (rows, 3), "reference_direction"))
        object.__setattr__(self, "coefficients",
                           _frozen(self.coefficients, ((int(self.lmax) + 1) ** 2,), "coefficients"))

    def surface(self):
        """The :class:`penumbra_server.numerics.displaced.DisplacedSurface` (needs scipy)."""
        from ..numerics.displaced import DisplacedSurface, ReferenceSurface

        reference = ReferenceSurface(int(self.reference_lmax), self.reference_position, self.reference_direction)
        return DisplacedSurface(reference, int(self.lmax), self.coefficients)


def displacement_row(group_lmax: int, displaced: ArchivedDisplacement | None) -> dict:
    """The ``displacement*`` column values of one row of a surface group of degree
    ``group_lmax`` (None: a star-shaped surface, degrees -1 and NaN coefficients).

    Raises ValueError when a degree exceeds what the group's columns hold (h: ``group_lmax``;
    the reference: ``group_lmax`` + DISPLACEMENT_REFERENCE_EXTRA_DEGREE)."""
    h = np.full((group_lmax + 1) ** 2, np.nan)
    rows = layout.displacement_reference_rows(group_lmax)
    position, direction = np.full((rows, 3), np.nan), np.full((rows, 3), np.nan)
    if displaced is None:
        return {"displacement_lmax": -1, "displacement": h, "displacement_reference_lmax": -1,
                "displacement_reference_position": position, "displacement_reference_direction": direction}
    if displaced.lmax > group_lmax:
        raise ValueError(f"displacement.lmax: expected at most {group_lmax} (the surface group's degree), "
                         f"got {displaced.lmax}")
    reference_limit = group_lmax + layout.DISPLACEMENT_REFERENCE_EXTRA_DEGREE
    if displaced.reference_lmax > reference_limit:
        raise ValueError(f"displacement.reference_lmax: expected at most {reference_limit}, "
                         f"got {displaced.reference_lmax}")
    h[: displaced.coefficients.size] = displaced.coefficients
    used = displaced.reference_position.shape[0]
    position[:used] = displaced.reference_position
    direction[:used] = displaced.reference_direction
    return {"displacement_lmax": int(displaced.lmax), "displacement": h,
            "displacement_reference_lmax": int(displaced.reference_lmax),
            "displacement_reference_position": position, "displacement_reference_direction": direction}


def displacement_from_row(row: Mapping) -> ArchivedDisplacement | None:
    """The displacement form archived in ``row`` (column name -> value of one row of a surface
    group), or None: a star-shaped surface, a row not found, or an archive written before the
    ``displacement*`` columns existed."""
    lmax = row.get("displacement_lmax")
    if lmax is None or int(lmax) < 0:
        return None
    lmax, reference_lmax = int(lmax), int(row["displacement_reference_lmax"])
    rows = (reference_lmax + 1) ** 2
    return ArchivedDisplacement(
        reference_lmax=reference_lmax,
        reference_position=np.asarray(row["displacement_reference_position"], dtype=float)[:rows],
        reference_direction=np.asarray(row["displacement_reference_direction"], dtype=float)[:rows],
        lmax=lmax,
        coefficients=np.asarray(row["displacement"], dtype=float)[: (lmax + 1) ** 2],
    )
