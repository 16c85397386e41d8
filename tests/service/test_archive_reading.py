"""Reading a run archive from an analysis notebook: the light reader (numpy and zarr only),
xarray with time as a coordinate and no consolidated-metadata warning, one-line exports."""

from __future__ import annotations

import subprocess
import sys
import warnings

import numpy as np
import pytest
import zarr

import penumbra_shim as ps
from penumbra_server.archive import list_archives, open_archive

from service_support import lone_hole_slice, lone_spec

xr = pytest.importorskip("xarray")

#: The notebook lines of README.md, "Reading results in a notebook", verbatim (the path is the
#: only thing substituted): open a surface group, export it to CSV and to netCDF.
README_LINES = """\
import xarray as xr
ds = xr.open_zarr("archive/<run_id>.zarr", group="surfaces/A")
ds[["area", "irreducible_mass", "christodoulou_mass"]].to_dataframe().to_csv("A.csv")
ds[["area", "irreducible_mass", "centroid"]].to_netcdf("A.nc", engine="scipy")   # netCDF3 via scipy
"""


def _finished_run(client, archive_root, name):
    run = client.open_run(lone_spec(name))
    for t in [run.submit(lone_hole_slice(i)) for i in range(3)]:
        assert t.result(60).accepted
    run.close()
    list(client.watch(run.run_id, from_seq=1, timeout_s=600))  # until the run's stream ends
    return open_archive(archive_root, run.run_id)


def test_xarray_opens_a_served_archive_with_time_as_coordinate_and_exports(client, archive_root, tmp_path):
    view = _finished_run(client, archive_root, "reading")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        ds = xr.open_zarr(view.path, group="surfaces/A")
        slices = xr.open_dataset(view.path, group="slices", engine="zarr")
    assert not [w for w in caught if "consolidated" in str(w.message).lower()], [str(w.message) for w in caught]
    assert "time" in ds.coords and ds["time"].dims == ("time",) and ds.indexes["time"].is_monotonic_increasing
    np.testing.assert_allclose(ds["time"].values, view.surface("A")["time"])
    np.testing.assert_array_equal(ds["area"].values, view.surface("A")["area"])
    assert ds["centroid"].dims == ("time", "xyz") and "time" in slices.coords
    assert float(ds["area"].sel(time=0.1)) == view.surface("A")["area"][1]  # selection by time, no swap_dims
    # The one-line exports of README.md, "Reading results in a notebook".
    columns = ["area", "irreducible_mass", "christodoulou_mass", "residual_max"]
    ds[columns].to_dataframe().to_csv(tmp_path / "A.csv")
    table = np.genfromtxt(tmp_path / "A.csv", delimiter=",", names=True)
    np.testing.assert_allclose(table["time"], ds["time"].values)
    np.testing.assert_allclose(table["area"], ds["area"].values)
    ds[columns + ["centroid"]].to_netcdf(tmp_path / "A.nc", engine="scipy")  # netCDF3 needs no extra package
    back = xr.open_dataset(tmp_path / "A.nc", engine="scipy")
    np.testing.assert_allclose(back["centroid"].values, ds["centroid"].values)
    assert "time" in back.coords
    # The archive's own reader gives the same dataset, and plain dicts of numpy arrays.
    assert view.surface_dataset("A")["time"].dims == ("time",)
    assert view.slices_dataset().sizes["time"] == 3
    assert any(s.run_id == view.run_id for s in list_archives(archive_root))


def test_the_readme_lines_run_as_written(client, archive_root, tmp_path, monkeypatch):
    view = _finished_run(client, archive_root, "readme lines")
    monkeypatch.chdir(tmp_path)
    namespace: dict = {}
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no warning at all, consolidated metadata or other
        exec(README_LINES.replace("archive/<run_id>.zarr", str(view.path)), namespace)
    ds = namespace["ds"]
    assert ds["time"].dims == ("time",) and "time" in ds.coords
    table = np.genfromtxt(tmp_path / "A.csv", delimiter=",", names=True)
    assert table.dtype.names == ("time", "area", "irreducible_mass", "christodoulou_mass")
    np.testing.assert_allclose(table["time"], view.surface("A")["time"])
    np.testing.assert_allclose(table["christodoulou_mass"], view.surface("A")["christodoulou_mass"])
    back = xr.open_dataset(tmp_path / "A.nc", engine="scipy")
    np.testing.assert_allclose(back["centroid"].values, view.surface("A")["centroid"])
    np.testing.assert_allclose(back["time"].values, view.surface("A")["time"])


def test_archives_written_with_the_older_dimension_names_read_the_same(tmp_path):
    # An archive as written before the rename: row dimensions "slice" and "sample", no
    # consolidated metadata. Built with zarr directly, the way the older writer laid it out.
    path = tmp_path / "old-run.zarr"
    root = zarr.open_group(str(path), mode="w-", zarr_format=3)
    surface = root.create_group("surfaces").create_group("A")
    slices = root.create_group("slices")
    for group, dim in ((surface, "sample"), (slices, "slice")):
        for name in ("time", "iteration"):
            arr = group.create_array(name, shape=(2,), dtype="float64" if name == "time" else "int64",
                                     dimension_names=[dim])
            arr[:] = [0.0, 0.5] if name == "time" else [0, 5]
    area = surface.create_array("area", shape=(2,), dtype="float64", dimension_names=["sample"])
    area[:] = [50.0, 50.3]
    root.update_attributes({"penumbra_archive_version": 1, "run_id": "old-run", "committed_rows":
                            {"slices": 2, "surfaces/A": 2}, "surface_labels": ["A"], "lmax": 4})
    view = open_archive(path)
    ds = view.surface_dataset("A")
    assert ds["area"].dims == ("time",) and ds["time"].values.tolist() == [0.0, 0.5]
    assert view.slices_dataset()["iteration"].dims == ("time",)
    assert view.surface("A")["area"].tolist() == [50.0, 50.3]


def test_the_reader_imports_neither_grpc_nor_scipy():
    code = ("import sys; import penumbra_server.archive.reader; "
            "print(','.join(m for m in ('grpc', 'scipy', 'xarray', 'google.protobuf') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
