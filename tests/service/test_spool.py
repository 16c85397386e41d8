"""The run spool on a real disk: a slice comes back exactly as written, interrupted writes and
released slices are gone, a closed run's spool is removed."""

from __future__ import annotations

import numpy as np
import pytest

from penumbra_server.numerics.slices import Patch, Slice, VariableSet
from penumbra_server.server.run_types import QueuedSlice
from penumbra_server.server.spool import RunSpool, spool_path

FIELDS = ("gamma_xx", "gamma_xy", "gamma_xz", "gamma_yy", "gamma_yz", "gamma_zz",
          "K_xx", "K_xy", "K_xz", "K_yy", "K_yz", "K_zz")


def _patch(rng, shape, order, level):
    fields = {name: np.asarray(rng.standard_normal(shape), order=order) + (3.0 if name in ("gamma_xx",
              "gamma_yy", "gamma_zz") else 0.0) for name in FIELDS}
    return Patch(origin=np.array([-1.0, -0.5, 0.25]), spacing=np.array([0.1, 0.2, 0.05]), shape=shape, level=level,
                 fields=fields, memory_order=order)


def _item(iteration: int) -> QueuedSlice:
    rng = np.random.default_rng(iteration)
    slice_ = Slice(time=0.1 * iteration + 1e-13, iteration=iteration, variable_set=VariableSet.ADM,
                   patches=(_patch(rng, (5, 6, 7), "C", 0), _patch(rng, (4, 3, 5), "F", 1)))
    return QueuedSlice(slice_=slice_, nbytes=12345, arrival_unix_s=1700000000.123456)


def test_a_spooled_slice_comes_back_bit_for_bit(tmp_path):
    spool = RunSpool(spool_path(tmp_path, "run-x"))
    item = _item(7)
    spool.write(item)
    [entry] = RunSpool(spool.directory).entries()  # as a restarted server finds it
    back = RunSpool.load(entry)
    assert (back.iteration, back.nbytes, back.arrival_unix_s) == (7, 12345, item.arrival_unix_s)
    assert back.slice_.time == item.slice_.time and back.slice_.variable_set is VariableSet.ADM
    for old, new in zip(item.slice_.patches, back.slice_.patches):
        assert new.shape == old.shape and new.level == old.level and new.memory_order == old.memory_order
        np.testing.assert_array_equal(new.origin, old.origin)
        np.testing.assert_array_equal(new.spacing, old.spacing)
        assert list(new.fields) == list(old.fields)
        for name in old.fields:
            np.testing.assert_array_equal(new.fields[name], old.fields[name])
            assert new.fields[name].flags.writeable


def test_entries_come_in_iteration_order_without_interrupted_writes(tmp_path):
    spool = RunSpool(tmp_path / "run.spool")
    for iteration in (12, 3, 100):
        spool.write(_item(iteration))
    (spool.directory / ".it55.tmp").write_bytes(b"half a slice")  # a write a kill interrupted
    fresh = RunSpool(spool.directory)
    assert [e.iteration for e in fresh.entries()] == [3, 12, 100]
    assert not (spool.directory / ".it55.tmp").exists()
    fresh.release([12, 999])
    assert [e.iteration for e in RunSpool(spool.directory).entries()] == [3, 100]
    assert fresh.count == 2
    fresh.remove_all()
    assert not spool.directory.exists() and RunSpool(spool.directory).entries() == []


def test_a_malformed_file_is_named(tmp_path):
    spool = RunSpool(tmp_path / "run.spool")
    spool.write(_item(1))
    [entry] = spool.entries()
    entry.path.write_bytes(entry.path.read_bytes()[:40])
    with pytest.raises(ValueError, match="it1.slice"):
        RunSpool.load(entry)
