"""Part files on a real disk: a part comes back exactly as written, interrupted writes are never
read, the files of an iteration go only once its slice is spooled whole; an assembly rebuilt
from the files hands on a complete slice at once and completes a partial one with its last part."""

from __future__ import annotations

import asyncio
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_server.numerics.slices import Patch, VariableSet
from penumbra_server.server.part_files import PartFiles, StoredPart
from penumbra_server.server.parts import PartAssembly, PartLabel, ReceivedPart
from penumbra_server.server.run_types import QueuedSlice
from penumbra_server.server.spool import RunSpool, spool_path

FIELDS = ("gamma_xx", "gamma_xy", "gamma_xz", "gamma_yy", "gamma_yz", "gamma_zz",
          "K_xx", "K_xy", "K_xz", "K_yy", "K_yz", "K_zz")


def _patch(seed: int, order: str = "C", x0: float = 0.0) -> Patch:
    rng = np.random.default_rng(seed)
    shape = (4, 5, 3)
    fields = {name: np.asarray(rng.standard_normal(shape), order=order) for name in FIELDS}
    return Patch(origin=np.array([x0, -0.5, 0.25]), spacing=np.array([0.1, 0.2, 0.05]), shape=shape, level=1,
                 fields=fields, memory_order=order)


def _stored(iteration: int, index: int, count: int, patches=()) -> StoredPart:
    return StoredPart(iteration=iteration, time=0.5 * iteration + 1e-13, variable_set=VariableSet.ADM, index=index,
                      count=count, patches=tuple(patches), nbytes=1000 + index, arrival_unix_s=1700000000.25)


def test_a_part_comes_back_bit_for_bit_and_an_empty_part_too(tmp_path):
    files = PartFiles(spool_path(tmp_path, "run-x"))
    written = _stored(4, 1, 3, [_patch(1, "F"), _patch(2, "C", x0=0.3)])
    path = files.write(written)
    assert path.name == "it4.part1of3"
    files.write(_stored(4, 2, 3))  # an empty part: a rank whose boxes miss every data window
    back = PartFiles(files.directory).iterations()  # as a restarted server finds them
    assert list(back) == [4]
    part, empty = back[4]
    assert (part.iteration, part.index, part.count, part.nbytes) == (4, 1, 3, 1001)
    assert part.time == written.time and part.variable_set is VariableSet.ADM
    assert part.arrival_unix_s == written.arrival_unix_s
    for old, new in zip(written.patches, part.patches):
        assert new.memory_order == old.memory_order and new.shape == old.shape and new.level == old.level
        np.testing.assert_array_equal(new.origin, old.origin)
        for name in FIELDS:
            assert np.array_equal(new.fields[name], old.fields[name])
    assert (empty.index, empty.patches) == (2, ())


def test_an_interrupted_write_is_never_read_and_the_spool_removes_it(tmp_path):
    files = PartFiles(spool_path(tmp_path, "run-x"))
    files.write(_stored(2, 0, 2, [_patch(3)]))
    (files.directory / ".it2.part1of2.tmp").write_bytes(b"half a part")  # a write a kill interrupted
    assert [p.index for p in files.iterations()[2]] == [0]
    assert RunSpool(files.directory).entries() == []  # a restart's spool read clears temporary files
    assert not (files.directory / ".it2.part1of2.tmp").exists()
    assert [p.index for p in files.iterations()[2]] == [0]


def test_parts_go_only_once_their_slice_is_spooled_and_only_their_own(tmp_path):
    spool = RunSpool(spool_path(tmp_path, "run-x"))
    files = PartFiles(spool.directory)
    for iteration in (5, 6):
        for index in range(2):
            files.write(_stored(iteration, index, 2, [_patch(10 * iteration + index)]))
    assert files.release_if_spooled(5, spool.path_for(5)) == 0  # the slice's spool write failed: kept
    assert sorted(files.paths()) == [5, 6]
    assert files.release(5) == 2
    assert sorted(files.paths()) == [6] and len(files.paths()[6]) == 2


def test_a_file_whose_header_disagrees_with_its_name_is_an_error_naming_it(tmp_path):
    files = PartFiles(spool_path(tmp_path, "run-x"))
    files.write(_stored(7, 0, 3))
    files.path_for(7, 0, 3).rename(files.path_for(7, 1, 3))
    with pytest.raises(ValueError, match=r"it7\.part1of3"):
        files.iterations()
    files.write(_stored(7, 0, 3))
    files.write(_stored(7, 2, 4))  # a part count other than the iteration's first part's
    files.path_for(7, 1, 3).unlink()
    with pytest.raises(ValueError, match=r"it7\.part2of4.*part count 4, expected 3"):
        files.iterations()


class _RecordingRun:
    """A run reduced to what an assembly needs of it (parts.PartSink): it spools each slice
    handed on, on the same executor as the part files, as the server's run does."""

    def __init__(self, spool: RunSpool, executor: ThreadPoolExecutor) -> None:
        self.spool, self.executor = spool, executor
        self.accepted: dict[int, object] = {}

    def check_accepting(self) -> None:
        return None

    def is_duplicate(self, iteration: int) -> bool:
        return iteration in self.accepted

    def duplicate_response(self, iteration: int, received_bytes: int) -> pb.SendSliceResponse:
        return pb.SendSliceResponse(iteration=iteration, outcome=pb.SendSliceResponse.OUTCOME_DUPLICATE)

    def accept_assembled(self, slice_, nbytes, report):
        assert report is None, report.message
        self.accepted[slice_.iteration] = (slice_, nbytes)
        self.executor.submit(self.spool.write, QueuedSlice(slice_=slice_, nbytes=nbytes, arrival_unix_s=0.0))
        return pb.SendSliceResponse(iteration=slice_.iteration, outcome=pb.SendSliceResponse.OUTCOME_ACCEPTED)


def test_an_assembly_rebuilt_from_part_files_completes_each_slice_once(tmp_path):
    spool = RunSpool(spool_path(tmp_path, "run-x"))
    files = PartFiles(spool.directory)
    patches = {k: _patch(k, x0=0.3 * k) for k in range(3)}
    for index in range(3):  # iteration 8: every part kept before a kill (the last one unanswered)
        files.write(_stored(8, index, 3, [patches[index]]))
    files.write(_stored(9, 0, 3, [patches[0]]))  # iteration 9: two parts of three
    files.write(_stored(9, 2, 3, [patches[2]]))

    async def scenario():
        with ThreadPoolExecutor(max_workers=1) as executor:
            run = _RecordingRun(spool, executor)
            assembly = PartAssembly(run, run_id="run-x", deadline_s=600.0)
            assembly.attach_files(files, executor, spool.path_for)
            assembly.restore(files.iterations())
            assert list(run.accepted) == [8]  # complete: handed on at once
            assert assembly.pending_summary() == [(9, [0, 2], 3)]  # partial: waits for part 1
            part = ReceivedPart(iteration=9, time=_stored(9, 1, 3).time, variable_set=VariableSet.ADM,
                                label=PartLabel(1, 3), patches=(patches[1],), nbytes=1001)
            response = await assembly.receive(part, max_bytes=1 << 30)
            assert response.outcome == pb.SendSliceResponse.OUTCOME_ACCEPTED and response.persisted
            assert (response.parts_received, response.parts_expected) == (3, 3)
            again = await assembly.receive(part, max_bytes=1 << 30)  # a copy: held, not stored again
            assert again.outcome == pb.SendSliceResponse.OUTCOME_DUPLICATE
            assert list(run.accepted) == [8, 9]

    asyncio.run(scenario())
    assert sorted(p.name for p in spool.directory.iterdir()) == ["it8.slice", "it9.slice"]  # parts gone
    for iteration in (8, 9):
        back = RunSpool.load(next(e for e in spool.entries() if e.iteration == iteration))
        assert back.nbytes == 1000 + 1001 + 1002
        assert [float(p.origin[0]) for p in back.slice_.patches] == [0.0, 0.3, 0.6]  # part order
        for k, patch in enumerate(back.slice_.patches):
            assert np.array_equal(patch.fields["K_xy"], patches[k].fields["K_xy"])
