"""The shim's crop of patches to data windows: whole nodes, node-aligned, values unchanged."""

import ast
import pathlib

import numpy as np
import pytest

from penumbra_shim.cropping import CropError, crop_index_box, crop_patches

CROPPING_SOURCE = pathlib.Path(__file__).resolve().parents[2] / "client" / "penumbra_shim" / "cropping.py"


def coordinate_fields(origin, spacing, shape, order="C"):
    """Fields whose values encode the node coordinates, so any shift of the data shows."""
    axes = [origin[a] + spacing[a] * np.arange(shape[a]) for a in range(3)]
    x, y, z = np.meshgrid(*axes, indexing="ij")
    make = np.asfortranarray if order == "F" else np.ascontiguousarray
    return {"fx": make(x.copy()), "fy": make(y.copy()), "fz": make(z.copy()),
            "mix": make(np.sin(x) + 3 * y * z)}


def patch(origin=(-2.0, -1.5, -1.0), spacing=(0.1, 0.125, 0.2), shape=(41, 25, 11), level=3, order="C"):
    origin = np.asarray(origin, float)
    spacing = np.asarray(spacing, float)
    return dict(origin=origin, spacing=spacing, shape=shape, level=level, memory_order=order,
                fields=coordinate_fields(origin, spacing, shape, order))


def check_cut(source, cut):
    """The cut sits on the source lattice and carries the source values at those nodes."""
    offset = (cut.origin - source["origin"]) / source["spacing"]
    np.testing.assert_allclose(offset, np.round(offset), atol=1e-9)
    np.testing.assert_array_equal(np.round(offset).astype(int), cut.index_offset)
    np.testing.assert_array_equal(cut.spacing, source["spacing"])
    index = tuple(slice(o, o + n) for o, n in zip(cut.index_offset, cut.shape))
    for name, arr in cut.fields.items():
        assert arr.shape == cut.shape
        np.testing.assert_array_equal(arr, source["fields"][name][index])
    axes = [cut.origin[a] + cut.spacing[a] * np.arange(cut.shape[a]) for a in range(3)]
    np.testing.assert_allclose(cut.fields["fx"][:, 0, 0], axes[0], atol=1e-12)
    np.testing.assert_allclose(cut.fields["fy"][0, :, 0], axes[1], atol=1e-12)
    np.testing.assert_allclose(cut.fields["fz"][0, 0, :], axes[2], atol=1e-12)


def test_crop_keeps_node_alignment_and_values_and_encloses_the_window():
    source = patch()
    lower, upper = np.array([-0.33, -0.4, -0.5]), np.array([0.41, 0.2, 0.35])
    cuts = crop_patches([source], [(lower, upper)])
    assert len(cuts) == 1
    cut = cuts[0]
    check_cut(source, cut)
    assert cut.level == 3 and cut.source_index == 0
    # Encloses the window with whole nodes and no more than one node beyond it on each side.
    assert np.all(cut.origin <= lower + 1e-12) and np.all(cut.upper >= upper - 1e-12)
    assert np.all(cut.origin > lower - cut.spacing) and np.all(cut.upper < upper + cut.spacing)
    assert cut.nbytes() < sum(a.nbytes for a in source["fields"].values())


def test_window_corners_on_nodes_take_no_extra_node():
    source = patch()
    lower = source["origin"] + np.array([10, 4, 2]) * source["spacing"]
    upper = source["origin"] + np.array([20, 12, 6]) * source["spacing"]
    (cut,) = crop_patches([source], np.array([[lower, upper]]))
    assert cut.index_offset == (10, 4, 2)
    assert cut.shape == (11, 9, 5)
    check_cut(source, cut)


def test_extra_nodes_and_clipping_to_the_patch():
    source = patch()
    lower = source["origin"] + np.array([10, 4, 2]) * source["spacing"]
    upper = source["origin"] + np.array([20, 12, 6]) * source["spacing"]
    (cut,) = crop_patches([source], [(lower, upper)], extra_nodes=3)
    assert cut.index_offset == (7, 1, 0)  # z clipped at the patch's first node
    assert cut.shape == (17, 15, 10)
    check_cut(source, cut)
    # A window sticking out of the patch is cut at the patch boundary.
    (edge,) = crop_patches([source], [([-5.0, -5.0, -5.0], [-1.9, -1.4, -0.9])])
    assert edge.index_offset == (0, 0, 0) and edge.shape == (2, 2, 2)
    check_cut(source, edge)


def test_windows_missing_a_patch_yield_nothing_and_overlapping_windows_one_cut():
    source = patch()
    assert crop_patches([source], [([5.0, 5.0, 5.0], [6.0, 6.0, 6.0])]) == []
    overlapping = [([-1.0, -1.0, -0.8], [0.0, 0.0, 0.0]), ([-0.5, -0.5, -0.5], [0.5, 0.5, 0.5])]
    cuts = crop_patches([source], overlapping)
    assert len(cuts) == 1
    check_cut(source, cuts[0])
    assert np.all(cuts[0].origin <= [-1.0, -1.0, -0.8]) and np.all(cuts[0].upper >= [0.5, 0.5, 0.5])
    apart = [([-1.9, -1.4, -0.9], [-1.5, -1.0, -0.5]), ([1.0, 1.0, 0.5], [1.5, 1.4, 0.9])]
    assert len(crop_patches([source], apart)) == 2


def test_fortran_order_patch_objects_and_thin_windows():
    from penumbra_server.numerics.slices import Patch

    source = patch(order="F")
    obj = Patch(origin=source["origin"], spacing=source["spacing"], shape=source["shape"], level=2,
                fields=source["fields"], memory_order="F")
    (cut,) = crop_patches([obj], [([0.0, 0.0, 0.0], [0.0, 0.0, 0.0])])  # a point: 2 nodes per axis
    assert cut.shape == (2, 2, 2) and cut.memory_order == "F" and cut.level == 2
    assert all(a.flags.f_contiguous for a in cut.fields.values())
    check_cut(source, cut)
    # Patches passed with an "arrays" key instead of "fields" work too.
    alt = {k: v for k, v in source.items() if k != "fields"} | {"arrays": source["fields"]}
    (cut2,) = crop_patches([alt], [([0.0, 0.0, 0.0], [0.3, 0.3, 0.3])])
    check_cut(source, cut2)


def test_several_patches_keep_their_levels_and_indices():
    coarse = patch(origin=(-4, -4, -4), spacing=(0.4, 0.4, 0.4), shape=(21, 21, 21), level=0)
    fine = patch(origin=(-1, -1, -1), spacing=(0.1, 0.1, 0.1), shape=(21, 21, 21), level=2)
    cuts = crop_patches([coarse, fine], [([-0.35, -0.35, -0.35], [0.35, 0.35, 0.35])])
    assert [c.source_index for c in cuts] == [0, 1]
    assert [c.level for c in cuts] == [0, 2]
    for source, cut in zip((coarse, fine), cuts):
        check_cut(source, cut)


def test_bad_input_names_the_field():
    source = patch()
    with pytest.raises(CropError, match="windows"):
        crop_patches([source], [([1, 1, 1], [0, 0, 0])])
    with pytest.raises(CropError, match="fields"):
        crop_patches([{"origin": [0, 0, 0], "spacing": [1, 1, 1], "shape": (2, 2, 2)}], [([0] * 3, [1] * 3)])
    bad = dict(source)
    bad["fields"] = {"f": np.zeros((2, 2, 2))}
    with pytest.raises(CropError, match="field 'f'"):
        crop_patches([bad], [([0] * 3, [1] * 3)])
    with pytest.raises(CropError, match="extra_nodes"):
        crop_patches([source], [([0] * 3, [1] * 3)], extra_nodes=-1)
    assert crop_index_box([0, 0, 0], [1, 1, 1], (5, 5, 5), [10, 10, 10], [11, 11, 11]) is None


def _top_level_imports(source: str) -> set[str]:
    """Modules a source imports when it is imported: module-level statements only (imports
    inside functions run when called; those under ``if TYPE_CHECKING:`` never). Relative
    imports as ".name"."""
    imported = set()
    pending = list(ast.parse(source).body)
    while pending:
        node = pending.pop()
        if isinstance(node, ast.If) and getattr(node.test, "id", "") != "TYPE_CHECKING":
            pending.extend(node.body + node.orelse)
        elif isinstance(node, ast.Try):
            pending.extend(node.body + node.orelse + node.finalbody + [s for h in node.handlers for s in h.body])
        elif isinstance(node, ast.Import):
            imported.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            imported.add((node.module or "").split(".")[0] if node.level == 0 else "." + (node.module or ""))
    return imported


def test_cropping_module_imports_numpy_only():
    # Besides numpy, only the shim's error classes, which import the standard library alone (grpc
    # only inside the function that translates a failed call).
    assert _top_level_imports(CROPPING_SOURCE.read_text()) <= {"__future__", "dataclasses", "typing", "numpy",
                                                               "._errors"}
    errors_source = (CROPPING_SOURCE.parent / "_errors.py").read_text()
    assert _top_level_imports(errors_source) <= {"__future__", "typing"}


def test_server_data_windows_can_be_passed_directly():
    from penumbra_server.tracking import DataWindow

    source = patch()
    windows = [DataWindow(name="A", lower=[-0.33, -0.4, -0.5], upper=[0.41, 0.2, 0.35], reason="test")]
    (cut,) = crop_patches([source], windows)
    (same,) = crop_patches([source], [(windows[0].lower, windows[0].upper)])
    assert cut.index_offset == same.index_offset and cut.shape == same.shape
    check_cut(source, cut)
