"""Reflection symmetry through z = 0: fill z < 0 from a slice that carries z >= 0 only.

Under the reflection z -> -z a tensor component picks up one factor -1 per z index. So, by
field name (the names of :mod:`penumbra_server.numerics.slices`):

* even: scalars (lapse, chi, W, phi, trace_K), shift_x, shift_y and the xx, xy, yy, zz
  components of the symmetric tensors gamma, K, gamma_tilde, A_tilde;
* odd: shift_z and the xz, yz components of those tensors.

The general rule used is: a name ending in ``_<indices>`` with indices drawn from x, y, z
(one to three of them) is a tensor component with parity (-1)^(number of z's); any other
name is a scalar (even). ``parity_overrides`` sets the parity of other fields explicitly
(e.g. a pseudo-vector).

Grids: vertex-centred patches whose lowest node is on the plane (z0 = 0) are extended through
it: the mirrored patch has 2 nz - 1 nodes from -z_max to z_max, the plane's nodes kept once.
Patches lying wholly above the plane with z0 >= dz are mirrored to a separate patch. A patch
with 0 < z0 < dz (e.g. the cell-centred-like staggering z0 = dz/2) is not supported and is an
error, as is any patch reaching below z = 0.
"""

from __future__ import annotations

import re
from typing import Mapping

import numpy as np

from .excision import ExcisedSphere
from .slices import Patch, Slice, SliceError

__all__ = ["field_parity", "mirror_patch_through_z0", "mirror_slice_through_z0"]

_TENSOR_SUFFIX = re.compile(r"_([xyz]{1,3})$")

#: Relative tolerance (in units of dz) for "the lowest node is on the plane".
_PLANE_TOLERANCE = 1e-9


def field_parity(name: str, *, parity_overrides: Mapping[str, int] | None = None) -> int:
    """+1 (even) or -1 (odd) under z -> -z for the field called ``name`` (module docstring)."""
    if parity_overrides and name in parity_overrides:
        p = int(parity_overrides[name])
        if p not in (1, -1):
            raise SliceError(f"parity_overrides[{name!r}]: expected +1 or -1, got {parity_overrides[name]!r}")
        return p
    match = _TENSOR_SUFFIX.search(name)
    if match is None:
        return 1
    return -1 if match.group(1).count("z") % 2 else 1


def mirror_patch_through_z0(
    patch: Patch,
    *,
    parity_overrides: Mapping[str, int] | None = None,
    index: int = 0,
) -> tuple[Patch, ...]:
    """The mirrored form of one z >= 0 patch: one extended patch, or the original and its image.

    Args:
        patch: a patch with every node at z >= 0.
        parity_overrides: field name -> +1 / -1 for fields the naming rule does not cover.
        index: the patch's index in its slice (for error messages).
    """
    z0 = float(patch.origin[2])
    dz = float(patch.spacing[2])
    tol = _PLANE_TOLERANCE * dz
    where = f"patches[{index}] (level {patch.level})"
    if z0 < -tol:
        raise SliceError(f"{where}: origin z = {z0!r} < 0; a reflection-symmetric slice carries z >= 0 only")
    parities = {name: field_parity(name, parity_overrides=parity_overrides) for name in patch.fields}
    if abs(z0) <= tol:
        fields = {}
        for name, arr in patch.fields.items():
            a = np.asarray(arr)
            image = parities[name] * a[:, :, :0:-1]  # nodes z = z_max .. dz mirrored, plane kept once
            fields[name] = np.concatenate([image, a], axis=2)
            if patch.memory_order == "F":
                fields[name] = np.asfortranarray(fields[name])
        nz = patch.shape[2]
        origin = patch.origin.copy()
        origin[2] = -(nz - 1) * dz
        return (Patch(origin=origin, spacing=patch.spacing.copy(), shape=(patch.shape[0], patch.shape[1], 2 * nz - 1),
                      level=patch.level, fields=fields, memory_order=patch.memory_order),)
    if z0 < dz - tol:
        staggered = abs(z0 - 0.5 * dz) <= tol
        raise SliceError(
            f"{where}: lowest node at z = {z0!r} lies between the plane and one spacing dz = {dz!r} above it"
            + (" (cell-centred staggering z0 = dz/2)" if staggered else "")
            + "; only vertex-centred grids with a node on z = 0 (z0 = 0) are supported"
        )
    fields = {}
    for name, arr in patch.fields.items():
        image = parities[name] * np.asarray(arr)[:, :, ::-1]
        fields[name] = np.asfortranarray(image) if patch.memory_order == "F" else np.ascontiguousarray(image)
    origin = patch.origin.copy()
    origin[2] = -float(patch.upper[2])
    image_patch = Patch(origin=origin, spacing=patch.spacing.copy(), shape=patch.shape, level=patch.level,
                        fields=fields, memory_order=patch.memory_order)
    return (patch, image_patch)


def mirror_slice_through_z0(
    slice_: Slice,
    *,
    parity_overrides: Mapping[str, int] | None = None,
) -> Slice:
    """A slice covering both sides of z = 0 from one that carries z >= 0 only.

    Args:
        slice_: the half slice (every patch at z >= 0; see the module docstring for the grids
            accepted).
        parity_overrides: field name -> +1 / -1 for fields the naming rule does not cover.

    Returns:
        A new :class:`Slice` with the same time, iteration and variable set; patches in the
        input order, each replaced by its mirrored form; the excised spheres with their mirror
        images (an ``excision_mask`` field is mirrored as an even scalar).
    """
    if not isinstance(slice_, Slice):
        raise SliceError(f"slice: expected a Slice, got {type(slice_).__name__}")
    patches: list[Patch] = []
    for index, patch in enumerate(slice_.patches):
        patches.extend(mirror_patch_through_z0(patch, parity_overrides=parity_overrides, index=index))
    # An excised sphere off the plane has a mirror image, excised as well.
    spheres = list(slice_.excised_spheres)
    for sphere in slice_.excised_spheres:
        image = ExcisedSphere((sphere.centre[0], sphere.centre[1], -sphere.centre[2]), sphere.radius, sphere.body)
        if image not in spheres:
            spheres.append(image)
    return Slice(time=slice_.time, iteration=slice_.iteration, variable_set=slice_.variable_set,
                 patches=tuple(patches), excised_spheres=tuple(spheres))
