"""The archive's write-behind journal on a real disk: its file format (no pickle, damage
detected), the reader merging unfolded commits, folds by count, age and close, and a real
server folding an open run's journal when it stops and reading it back after a restart."""

from __future__ import annotations

import asyncio
import time
import warnings

import numpy as np
import pytest
import zarr

from penumbra_server.archive import ArchiveWriter, FoldPolicy, open_archive
from penumbra_server.archive.journal import JournalEntry, JournalError, read_entry, write_entry
from penumbra_server.server import BackgroundServer, ServerOptions, create_server

from service_support import lone_hole_slice, lone_spec

LMAX = 2


def _writer(tmp_path, policy=FoldPolicy(commits=64), labels=("A",)):
    return ArchiveWriter.create(tmp_path, "run-journal", name="journal", run_spec={}, surface_labels=labels,
                                lmax=LMAX, software_version="test", fold_policy=policy)


def _slice_row(iteration: int) -> dict:
    return {"iteration": iteration, "time": 0.5 * iteration, "outcome": 1, "event_seq": iteration + 1}


def _surface_row(iteration: int) -> dict:
    return {"iteration": iteration, "time": 0.5 * iteration, "status": 0, "found": True, "reason": 0,
            "coefficients": np.arange((LMAX + 1) ** 2, dtype=float) + iteration, "area": 1.0 + iteration}


def _xarray_rows(path, group_path: str, **kwargs) -> int:
    xr = pytest.importorskip("xarray")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return int(xr.open_zarr(str(path), group=group_path, **kwargs).sizes["time"])


def test_a_journal_file_reads_back_exactly_and_damage_is_named(tmp_path):
    blocks = {"n": np.array([1, -2, 3], dtype="int64"), "x": np.array([[0.5, np.nan], [1e300, -0.0], [2, 3]]),
              "ok": np.array([True, False, True]), "small": np.array([1, 2, 3], dtype="int8"),
              "text": np.array(["plain", "ünïcode ∂", ""], dtype=object)}
    entry = JournalEntry(7, {"committed_rows": {"g": 3}, "state": "open"}, {"g": (0, blocks)})
    path = write_entry(tmp_path, entry)
    assert path.name == "000000000007.commit" and not list(tmp_path.glob(".*.tmp"))
    back = read_entry(path)
    assert back.commit == 7 and back.attrs == entry.attrs and back.rows("g") == 3
    start, got = back.groups["g"]
    assert start == 0 and sorted(got) == sorted(blocks)
    for name, values in blocks.items():
        assert got[name].dtype == values.dtype and got[name].shape == values.shape
        if values.dtype == object:
            assert got[name].tolist() == values.tolist()
        else:
            np.testing.assert_array_equal(got[name], values)
    raw = bytearray(path.read_bytes())
    raw[-1] ^= 0xFF  # a flipped bit in the column blocks
    path.write_bytes(bytes(raw))
    with pytest.raises(JournalError, match="000000000007.commit: crc32"):
        read_entry(path)
    path.write_bytes(b"\x80\x04pickle")
    with pytest.raises(JournalError, match="not a journal file"):
        read_entry(path)


def test_the_reader_sees_every_commit_and_xarray_the_folded_ones(tmp_path):
    writer = _writer(tmp_path, FoldPolicy(commits=3))
    for i in range(2):
        writer.commit(slice_rows=[_slice_row(i)], surface_rows={"A": [_surface_row(i)]},
                      group_rows={"tracks/A": [{"iteration": i, "time": 0.5 * i, "position": [i, 0, 0], "source": 1}]})
    assert writer.unfolded_commits == 2
    view = open_archive(writer.path)
    assert view.slices()["iteration"].tolist() == [0, 1]
    assert view.track("A")["position"][:, 0].tolist() == [0, 1]  # a group only the journal holds yet
    assert view.surface_dataset("A")["coefficients"].dims == ("time", "harmonic")
    assert _xarray_rows(writer.path, "slices") == 0  # xarray: the arrays, not folded yet
    writer.commit(slice_rows=[_slice_row(2)])  # the third commit: the policy folds
    assert writer.unfolded_commits == 0 and not list((writer.path / "journal").iterdir())
    assert _xarray_rows(writer.path, "slices") == 3
    assert _xarray_rows(writer.path, "surfaces/A") == 2
    # Rows split between the arrays and the journal read as one table.
    writer.commit(surface_rows={"A": [_surface_row(3)]})
    writer.add_surface("common", lmax=LMAX + 2)
    writer.commit(surface_rows={"common": [dict(_surface_row(3), coefficients=np.ones((LMAX + 3) ** 2))]})
    view = open_archive(writer.path)
    assert view.surface("A")["area"].tolist() == [1.0, 2.0, 4.0]
    np.testing.assert_allclose(view.surface("A")["coefficients"][2], np.arange(9) + 3)
    assert view.surface_labels == ("A", "common") and view.surface_lmax("common") == LMAX + 2
    assert view.surface_dataset("common")["coefficients"].shape == (1, (LMAX + 3) ** 2)
    before = {label: view.surface(label) for label in view.surface_labels}
    writer.close()
    after = open_archive(writer.path)
    assert after.committed_rows == view.committed_rows and after.attrs == view.attrs
    for label, columns in before.items():
        folded = after.surface(label)
        assert sorted(folded) == sorted(columns)
        for name, values in columns.items():
            np.testing.assert_array_equal(folded[name], values)
    assert _xarray_rows(writer.path, "surfaces/common") == 1


def test_a_fold_by_age_and_the_closing_commit(tmp_path):
    writer = _writer(tmp_path, FoldPolicy(commits=1000, after_s=3600.0))
    writer.commit(slice_rows=[_slice_row(0)])
    assert not writer.fold_due() and writer.unfolded_commits == 1
    writer.fold_policy = FoldPolicy(commits=1000, after_s=1e-9)  # any commit is old enough now
    assert writer.fold_due()
    writer.commit(slice_rows=[_slice_row(1)])
    assert writer.unfolded_commits == 0
    writer.fold_policy = FoldPolicy(commits=1000, after_s=3600.0)
    writer.commit(slice_rows=[_slice_row(2)], fold=False)
    writer.commit(attrs={"state": "closed"}, fold=False)  # closing folds whatever was asked
    assert writer.unfolded_commits == 0
    assert zarr.open_group(str(writer.path), mode="r").attrs["state"] == "closed"
    assert _xarray_rows(writer.path, "slices") == 3
    with pytest.raises(ValueError, match="commits: expected at least 1"):
        FoldPolicy(commits=0)
    with pytest.raises(ValueError, match="archive_fold_commits: expected at least 1"):
        asyncio.run(create_server("127.0.0.1:0", archive_root=tmp_path / "never",
                                  options=ServerOptions(archive_fold_commits=0)))


def _wait_processed(client, run_id: str, count: int, timeout_s: float = 300.0) -> None:
    deadline = time.monotonic() + timeout_s
    while client.get_run(run_id).slices_processed < count:
        if time.monotonic() > deadline:
            raise AssertionError(f"run {run_id}: {count} slices not processed within {timeout_s} s")
        time.sleep(0.05)


@pytest.mark.slow
def test_a_server_folds_an_open_run_when_it_stops_and_reads_it_back_after_a_restart(tmp_path):
    import penumbra_shim as ps

    archive = tmp_path / "archive"
    # Never folded by count or age in this test: only the stop, the restart and the close fold.
    options = ServerOptions(workers=1, archive_fold_commits=10_000, archive_fold_after_s=3600.0)
    with BackgroundServer("127.0.0.1:0", archive_root=archive, workers=1, options=options) as bg:
        with ps.connect(bg.address, deadline_s=60.0) as client:
            run = client.open_run(lone_spec("journal", lmax=4))
            for iteration in range(2):
                assert run.submit(lone_hole_slice(iteration, nodes=21)).result(120).accepted
            _wait_processed(client, run.run_id, 2)
            path = open_archive(archive, run.run_id).path
            assert list((path / "journal").iterdir())  # the commits wait in the journal
            assert open_archive(path).slices()["iteration"].tolist() == [0, 1]
            assert _xarray_rows(path, "slices") == 0
            run.close(close_run=False)
    # Stopped with the run open: its journal folded into the arrays.
    assert not list((path / "journal").iterdir())
    assert _xarray_rows(path, "slices") == 2 and _xarray_rows(path, "surfaces/A") == 2
    # Restarted with a short age: the idle run's journal is folded without another commit.
    options = ServerOptions(workers=1, archive_fold_commits=10_000, archive_fold_after_s=0.5)
    with BackgroundServer("127.0.0.1:0", archive_root=archive, workers=1, options=options) as bg:
        with ps.connect(bg.address, deadline_s=60.0) as client:
            assert client.get_run(run.run_id).highest_held_iteration == 1
            again = client.attach_run(run.run_id)
            assert again.submit(lone_hole_slice(2, nodes=21)).result(120).accepted
            _wait_processed(client, run.run_id, 3)
            assert open_archive(path).slices()["iteration"].tolist() == [0, 1, 2]
            deadline = time.monotonic() + 120.0
            while _xarray_rows(path, "slices") < 3:
                if time.monotonic() > deadline:
                    raise AssertionError("the idle run's journal was not folded within 120 s")
                time.sleep(0.1)
            again.close()
    view = open_archive(path)
    assert view.state == "closed" and view.slices()["iteration"].tolist() == [0, 1, 2]
    assert _xarray_rows(path, "slices") == 3 and not list((path / "journal").iterdir())
