"""The run archive on a real disk: layout, committed prefix, xarray, live reading."""

from __future__ import annotations

import threading
import warnings

import numpy as np
import pytest
import zarr

from penumbra_server.archive import (
    SLICE_OUTCOME_PROCESSED,
    SLICE_OUTCOME_SKIPPED,
    ArchiveError,
    ArchiveWriter,
    FoldPolicy,
    list_archives,
    open_archive,
    surface_columns,
)

LMAX = 4
NCOEF = (LMAX + 1) ** 2


def _writer(tmp_path, run_id="run-test", labels=("A", "B"), fold_commits=64):
    return ArchiveWriter.create(
        tmp_path,
        run_id,
        name="archive test",
        run_spec={"variable_set": "adm", "bodies": [{"label": lab} for lab in labels]},
        surface_labels=labels,
        lmax=LMAX,
        software_version="test",
        fold_policy=FoldPolicy(commits=fold_commits),
    )


def _surface_row(iteration: int, *, found: bool = True) -> dict:
    row = {"iteration": iteration, "time": 0.5 * iteration, "status": 0 if found else 2, "found": found,
           "reason": 0 if found else 1, "iterations": 5, "event_seq": 100 + iteration}
    if found:
        row.update(
            centre=np.array([1.0, 2.0, 3.0]),
            coefficients=np.arange(NCOEF, dtype=float) + iteration,
            area=16 * np.pi,
            irreducible_mass=1.0,
            coordinate_radius=[0.5, 0.5, 0.5],
        )
    return row


def test_rows_written_are_read_back_with_units_and_dimensions(tmp_path):
    writer = _writer(tmp_path)
    writer.commit(
        slice_rows=[{"iteration": 3, "time": 1.5, "bytes": 1000, "outcome": SLICE_OUTCOME_PROCESSED, "latency_s": 0.2},
                    {"iteration": 4, "time": 2.0, "bytes": 1000, "outcome": SLICE_OUTCOME_SKIPPED}],
        surface_rows={"A": [_surface_row(3)], "B": [_surface_row(3, found=False)]},
    )
    view = open_archive(tmp_path, "run-test")
    assert view.committed_rows == {"slices": 2, "surfaces/A": 1, "surfaces/B": 1}
    assert view.attrs["units"]["length"] == "M" and view.attrs["software_version"] == "test"
    slices = view.slices()
    assert slices["iteration"].tolist() == [3, 4]
    assert slices["outcome"].tolist() == [SLICE_OUTCOME_PROCESSED, SLICE_OUTCOME_SKIPPED]
    assert np.isnan(slices["latency_s"][1])  # a skipped slice has no latency
    a = view.surface("A")
    np.testing.assert_allclose(a["coefficients"][0], np.arange(NCOEF) + 3)
    np.testing.assert_allclose(a["centre"][0], [1, 2, 3])
    b = view.surface("B")
    assert not b["found"][0] and np.isnan(b["area"][0]) and b["status"][0] == 2
    # every array names its dimensions, so xarray opens each group as it is on disk: the rows
    # are in the zarr arrays once the writer folded its journal (here: at close)
    xr = pytest.importorskip("xarray")
    assert writer.unfolded_commits == 1
    assert xr.open_zarr(str(view.path), group="slices", consolidated=False).sizes["time"] == 0
    writer.close()
    assert writer.unfolded_commits == 0 and not (writer.path / "journal" / "000000000001.commit").exists()
    ds = xr.open_zarr(str(view.path), group="surfaces/A", consolidated=False)
    assert ds["coefficients"].dims == ("time", "harmonic")
    assert ds["centre"].dims == ("time", "xyz")
    assert float(ds["area"][0]) == pytest.approx(16 * np.pi)
    assert ds["area"].attrs["units"] == "M^2"
    assert view.surface_dataset("A")["iteration"].values.tolist() == [3]
    assert xr.open_zarr(str(view.path), group="slices", consolidated=False).sizes["time"] == 2


def test_reader_ignores_rows_beyond_the_committed_count(tmp_path):
    writer = _writer(tmp_path)
    writer.commit(surface_rows={"A": [_surface_row(1)]})
    # Simulate a crash between the data write and the counter bump: grow one array by hand.
    group = zarr.open_group(str(writer.path), mode="r+")
    area = group["surfaces/A/area"]
    area.resize((3,))
    area[1:3] = [7.0, 7.0]
    view = open_archive(writer.path)
    assert view.surface("A")["area"].tolist() == [pytest.approx(16 * np.pi)]
    # A writer reopened after the crash overwrites the orphan rows.
    again = ArchiveWriter.open_existing(writer.path)
    again.commit(surface_rows={"A": [_surface_row(2)]})
    areas = open_archive(writer.path).surface("A")["area"]
    assert areas.shape == (2,) and np.allclose(areas, 16 * np.pi)


@pytest.mark.parametrize("fold_commits", [2, 64])  # folds racing the reader; the journal only
def test_live_reader_always_sees_a_consistent_prefix(tmp_path, fold_commits):
    writer = _writer(tmp_path, labels=("A",), fold_commits=fold_commits)
    rounds = 15
    failures: list[str] = []
    done = threading.Event()

    def read_repeatedly():
        while not done.is_set():
            view = open_archive(writer.path)
            cols = view.surface("A")
            n = view.committed_rows["surfaces/A"]
            lengths = {name: len(values) for name, values in cols.items()}
            if set(lengths.values()) != {n}:
                failures.append(f"ragged columns {lengths} at committed {n}")
            # row i was written with iteration i: a torn row would break this
            if not np.array_equal(cols["iteration"], np.arange(n)) or np.isnan(cols["area"]).any():
                failures.append(f"inconsistent rows at committed {n}")

    reader = threading.Thread(target=read_repeatedly)
    reader.start()
    try:
        for i in range(rounds):
            writer.commit(surface_rows={"A": [_surface_row(i)]})
    finally:
        done.set()
        reader.join()
    assert failures == []
    assert open_archive(writer.path).committed_rows["surfaces/A"] == rounds


def test_bad_rows_and_labels_are_refused(tmp_path):
    writer = _writer(tmp_path)
    with pytest.raises(ArchiveError, match="unknown surface label 'C'"):
        writer.commit(surface_rows={"C": [_surface_row(1)]})
    with pytest.raises(ArchiveError, match="column 'coefficients': expected shape"):
        writer.commit(surface_rows={"A": [{"coefficients": np.zeros(3)}]})
    with pytest.raises(ArchiveError, match="already exists"):
        _writer(tmp_path)
    assert len(surface_columns(LMAX)) == len({c.name for c in surface_columns(LMAX)})


def test_list_archives_summarises_each_run(tmp_path):
    first = _writer(tmp_path, run_id="run-one")
    first.commit(slice_rows=[{"iteration": 1}], surface_rows={"A": [_surface_row(1)]})
    _writer(tmp_path, run_id="run-two")
    (tmp_path / "not-an-archive.zarr").mkdir()
    summaries = {s.run_id: s for s in list_archives(tmp_path)}
    assert set(summaries) == {"run-one", "run-two"}
    assert summaries["run-one"].slices == 1 and summaries["run-one"].surfaces == {"A": 1, "B": 0}


def test_an_archive_with_the_older_five_multipoles_is_widened_on_reopening(tmp_path):
    # Archives written before n = 0..8 hold multipoles n = 0..4. Rebuilt here with zarr as the
    # older writer left them; a restarted server appends rows of nine.
    writer = _writer(tmp_path)
    row = dict(_surface_row(1), mass_multipoles=np.arange(9.0), spin_multipoles=np.arange(9.0))
    writer.commit(surface_rows={"A": [row]}, fold=True)
    group = zarr.open_group(str(writer.path / "surfaces" / "A"), mode="r+", zarr_format=3)
    del group["mass_multipoles"]
    old = group.create_array("mass_multipoles", shape=(1, 5), chunks=(256, 5), dtype="float64", fill_value=np.nan,
                             dimension_names=["time", "multipole"])
    old[:] = [[1.0, 0.0, -0.1, 0.0, 0.02]]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # zarr: consolidated metadata is not yet in the v3 spec
        zarr.consolidate_metadata(str(writer.path))  # as the older writer left it: consistent
    again = ArchiveWriter.open_existing(writer.path)
    again.commit(surface_rows={"A": [dict(_surface_row(2), mass_multipoles=np.arange(9.0))]})
    moments = open_archive(writer.path).surface("A")["mass_multipoles"]
    assert moments.shape == (2, 9)
    np.testing.assert_array_equal(moments[0, :5], [1.0, 0.0, -0.1, 0.0, 0.02])
    assert np.all(np.isnan(moments[0, 5:]))
    np.testing.assert_array_equal(moments[1], np.arange(9.0))
