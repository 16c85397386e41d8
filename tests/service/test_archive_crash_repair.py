"""Archive commits killed half way (real SIGKILL of a writing process at a named point, and the
states such a kill leaves): the archive opens in the reader, zarr and xarray; the writer reopens
it, repairs it and commits again; half-created groups never block a later commit."""

from __future__ import annotations

import os
import subprocess
import sys
import warnings

import numpy as np
import pytest
import zarr

from penumbra_server.archive import ArchiveWriter, open_archive
from penumbra_server.archive import _layout as layout
from penumbra_server.crash_points import ENV_VAR

LMAX = 2


def _create(root, run_id="run-crash"):
    return ArchiveWriter.create(root, run_id, name="crash", run_spec={}, surface_labels=("A",), lmax=LMAX,
                                software_version="test")


def _slice_row(iteration: int) -> dict:
    return {"iteration": iteration, "time": 0.25 * iteration, "outcome": 1, "event_seq": iteration + 1}


def _track_row(iteration: int) -> dict:
    return {"iteration": iteration, "time": 0.25 * iteration, "position": [0.1, 0.2, 0.3 + iteration], "source": 1,
            "uncertainty": 0.0, "order": 0, "event_seq": iteration + 1}


#: A process that commits one slice and folds it, then commits one slice with a new tracking
#: group and folds that (the group is created by the fold).
_SCRIPT = """
import sys
from penumbra_server.archive import ArchiveWriter
w = ArchiveWriter.create(sys.argv[1], "run-crash", name="crash", run_spec={}, surface_labels=("A",), lmax=2,
                         software_version="test")
w.commit(slice_rows=[{"iteration": 0, "time": 0.0, "outcome": 1, "event_seq": 1}], fold=True)
w.commit(slice_rows=[{"iteration": 1, "time": 0.25, "outcome": 1, "event_seq": 2}],
         group_rows={"tracks/A": [{"iteration": 1, "time": 0.25, "position": [0.1, 0.2, 1.3], "source": 1,
                                   "uncertainty": 0.0, "order": 0, "event_seq": 2}]}, fold=True)
print("not killed")
"""


def _xarray_sizes(path, group_path, **kwargs) -> dict:
    xr = pytest.importorskip("xarray")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return dict(xr.open_zarr(str(path), group=group_path, **kwargs).sizes)


@pytest.mark.parametrize("point, rows_after_kill, folded_after_kill", [
    ("archive-mid-commit:2", 1, 1),          # the second commit's journal file flushed, not renamed
    ("archive-journal-written:2", 2, 1),     # the second commit durable, not yet returned
    ("archive-mid-group:3", 2, 1),           # passages 1-2: slices/ and surfaces/A at creation; 3: the
                                             # second fold creating tracks/A
    ("archive-mid-fold:2", 2, 1),            # the second fold's rows written, its counts not
    ("archive-before-consolidate:2", 2, 2),  # the second fold's counts written, consolidation not
    ("archive-before-journal-trim:2", 2, 2), # the second fold complete, its journal file not removed
])
def test_a_commit_killed_at_a_named_point_is_repaired(tmp_path, point, rows_after_kill, folded_after_kill):
    env = dict(os.environ, **{ENV_VAR: point})
    done = subprocess.run([sys.executable, "-c", _SCRIPT, str(tmp_path)], env=env, capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == -9, (done.returncode, done.stdout, done.stderr)
    path = layout.archive_path(tmp_path, "run-crash")
    view = open_archive(path)  # the project's reader: every durable commit, folded or not
    assert view.slices()["iteration"].tolist() == list(range(rows_after_kill))
    assert view.track("A")["iteration"].tolist() == ([1] if rows_after_kill == 2 else [])
    zarr.open_group(str(path), mode="r")
    # xarray (consolidated metadata): never a row the counts do not count
    assert _xarray_sizes(path, "slices")["time"] <= folded_after_kill
    assert int(zarr.open_group(str(path), mode="r").attrs["committed_rows"]["slices"]) == folded_after_kill

    writer = ArchiveWriter.open_existing(path)  # the restarted server's step: repair, fold, then go on
    assert not list((path / "journal").iterdir())  # folded, and a killed write's temporary removed
    assert _xarray_sizes(path, "slices")["time"] == rows_after_kill
    writer.commit(slice_rows=[_slice_row(5)], group_rows={"tracks/A": [_track_row(5)]})
    view = open_archive(path)
    assert view.slices()["iteration"].tolist() == list(range(rows_after_kill)) + [5]
    assert 5 in view.track("A")["iteration"].tolist()
    writer.close()
    for group_path, count in view.committed_rows.items():  # raw arrays, not only the consolidated copy
        sizes = _xarray_sizes(path, group_path, consolidated=False)
        assert all(n == count for dim, n in sizes.items() if dim in ("time", "point")), (group_path, sizes)


def test_a_half_created_group_does_not_block_later_commits(tmp_path):
    writer = _create(tmp_path)
    # What a kill during the group's creation leaves: the group and two of its arrays.
    raw = zarr.open_group(str(writer.path), mode="r+", zarr_format=3, use_consolidated=False)
    half = raw.require_group("tracks/A")
    for column in layout.TRACK_COLUMNS[:2]:
        half.create_array(column.name, shape=(3,), chunks=(16,), dtype=column.dtype,
                          dimension_names=["point"])
    # The same writer (no restart) creates the group over the remains (at its fold)...
    writer.commit(slice_rows=[_slice_row(0)], group_rows={"tracks/A": [_track_row(0)]}, fold=True)
    assert open_archive(writer.path).track("A")["iteration"].tolist() == [0]
    # ...and so does a reopened one over another half-made group, which the repair removes.
    half = raw.require_group("tracks/B")
    half.create_array("iteration", shape=(2,), chunks=(16,), dtype="int64", dimension_names=["point"])
    reopened = ArchiveWriter.open_existing(writer.path)
    assert not (writer.path / "tracks" / "B").exists()
    reopened.commit(slice_rows=[_slice_row(1)], group_rows={"tracks/B": [_track_row(1)]})
    view = open_archive(writer.path)
    assert view.track("B")["iteration"].tolist() == [1]
    assert view.slices()["iteration"].tolist() == [0, 1]


def test_rows_past_the_committed_count_are_invisible_and_cut_back(tmp_path):
    writer = _create(tmp_path)
    writer.commit(slice_rows=[_slice_row(0)], fold=True)
    # A kill after the rows of the next fold but before its counts: trailing rows on disk.
    raw = zarr.open_group(str(writer.path), mode="r+", zarr_format=3, use_consolidated=False)
    raw["slices/iteration"].resize((3,))
    raw["slices/iteration"][:] = np.array([0, 7, 8])
    assert open_archive(writer.path).slices()["iteration"].tolist() == [0]
    assert _xarray_sizes(writer.path, "slices")["time"] == 1
    reopened = ArchiveWriter.open_existing(writer.path)
    assert zarr.open_group(str(writer.path), mode="r", use_consolidated=False)["slices/iteration"].shape == (1,)
    assert _xarray_sizes(writer.path, "slices", consolidated=False)["time"] == 1
    reopened.commit(slice_rows=[_slice_row(1)])
    assert open_archive(writer.path).slices()["iteration"].tolist() == [0, 1]
