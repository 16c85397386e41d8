"""Excised regions as the shim declares them (numpy only; the server's copy of the rule is
``penumbra_server.numerics.excision``, and a test checks the two agree).

A run declares excised spheres in its spec (``RunSpec(excised_spheres=[...])``); a patch may
also carry a field named :data:`EXCISION_MASK_FIELD`, nonzero at excised nodes. Values at
excised nodes are not data: NaN is allowed there, and the server never reads them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ._wire import horizons_pb2 as pb

__all__ = ["EXCISION_MASK_FIELD", "ExcisedSphere", "excised_nodes"]

#: Optional per-patch field marking excised nodes (float data, nonzero = excised, finite).
EXCISION_MASK_FIELD = "excision_mask"


@dataclass(frozen=True)
class ExcisedSphere:
    """An excised ball: nodes with |x - centre| <= radius hold no data.

    Attributes:
        centre: (x, y, z), units of M.
        radius: > 0, units of M.
        body: label of the body whose interior it is (optional).
    """

    centre: tuple[float, float, float]
    radius: float
    body: str = ""

    def __post_init__(self) -> None:
        try:
            centre = tuple(float(v) for v in self.centre)
        except (TypeError, ValueError):
            raise ValueError(f"excised_spheres: centre: expected three numbers, got {self.centre!r}") from None
        if len(centre) != 3 or not all(math.isfinite(v) for v in centre):
            raise ValueError(f"excised_spheres: centre: expected three finite numbers, got {self.centre!r}")
        if not (math.isfinite(float(self.radius)) and float(self.radius) > 0):
            raise ValueError(f"excised_spheres: radius: expected a finite radius > 0 in M, got {self.radius!r}")
        object.__setattr__(self, "centre", centre)
        object.__setattr__(self, "radius", float(self.radius))
        object.__setattr__(self, "body", str(self.body))

    def to_wire(self) -> pb.ExcisedSphere:
        c = self.centre
        return pb.ExcisedSphere(centre_m=pb.Vector3(x=c[0], y=c[1], z=c[2]), radius_m=self.radius, body=self.body)

    @classmethod
    def from_wire(cls, sphere: pb.ExcisedSphere) -> "ExcisedSphere":
        c = sphere.centre_m
        return cls((c.x, c.y, c.z), sphere.radius_m, sphere.body)


def excised_nodes(origin, spacing, shape: Sequence[int], spheres: Sequence[ExcisedSphere] = (),
                  mask: np.ndarray | None = None) -> np.ndarray:
    """Boolean (nx, ny, nz) mask of a patch's excised nodes: inside or on a sphere, or where
    ``mask`` (indexed [i, j, k]) is nonzero."""
    result = np.zeros(tuple(int(n) for n in shape), dtype=bool)
    if mask is not None:
        result |= np.asarray(mask) != 0
    if spheres:
        axes = [float(origin[a]) + float(spacing[a]) * np.arange(int(shape[a])) for a in range(3)]
        for sphere in spheres:
            c = sphere.centre
            d2 = ((axes[0] - c[0]) ** 2)[:, None, None] + ((axes[1] - c[1]) ** 2)[None, :, None] \
                + ((axes[2] - c[2]) ** 2)[None, None, :]
            result |= d2 <= sphere.radius**2
    return result
