"""Crash tests' helpers: `penumbra serve` as a real subprocess that a test kills (or that kills
itself at a named point, see penumbra_server.crash_points), a raw wire client that remembers
every acknowledgement, and the archive checks made after each kill."""

from __future__ import annotations

import os
import subprocess
import sys
import time
import warnings
from pathlib import Path

import grpc
import numpy as np

from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_shim._wire import horizons_pb2_grpc as pb_grpc
from penumbra_server.archive import open_archive
from penumbra_server.crash_points import ENV_VAR

SERVE = [sys.executable, "-m", "penumbra_server.cli.main", "serve"]


class Serve:
    """One `penumbra serve` process on 127.0.0.1 (port 0) over ``archive``; ``crash_at`` sets
    the crash point (``"<point>:<n>"``), None for none."""

    def __init__(self, tmp_path: Path, archive: Path, crash_at: str | None = None, *,
                 listen: str = "127.0.0.1:0", options: tuple[str, ...] = ()) -> None:
        self.ready = tmp_path / f"address-{time.monotonic_ns()}"
        env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONUNBUFFERED="1")
        env.pop(ENV_VAR, None)
        if crash_at:
            env[ENV_VAR] = crash_at
        self.log = tmp_path / f"serve-{time.monotonic_ns()}.log"
        self._log_file = open(self.log, "w")
        command = SERVE + ["--listen", listen, "--archive-root", str(archive), "--workers", "1",
                           "--ready-file", str(self.ready)]
        for option in options:  # server options, KEY=VALUE
            command += ["--option", option]
        self.process = subprocess.Popen(command, stdout=self._log_file, stderr=subprocess.STDOUT, env=env)
        self.address = self._wait_ready()
        self.channel = grpc.insecure_channel(self.address)
        self.stub = pb_grpc.HorizonServiceStub(self.channel)

    def _wait_ready(self, timeout_s: float = 120.0) -> str:
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.ready.exists() and self.ready.read_text().strip():
                return self.ready.read_text().strip()
            if self.process.poll() is not None:
                raise AssertionError(f"serve exited early ({self.process.returncode}):\n{self.log.read_text()}")
            time.sleep(0.05)
        raise AssertionError(f"serve did not become ready within {timeout_s} s:\n{self.log.read_text()}")

    def killed_itself(self, timeout_s: float = 120.0) -> bool:
        """Wait for the process to end; True when it ended by SIGKILL."""
        try:
            self.process.wait(timeout=timeout_s)
        except subprocess.TimeoutExpired:
            raise AssertionError(f"serve still runs {timeout_s} s after its crash point should have been reached:\n"
                                 f"{self.log.read_text()}") from None
        return self.process.returncode == -9

    def kill(self) -> None:
        if self.process.poll() is None:
            self.process.kill()
        self.process.wait(timeout=60)

    def close(self) -> None:
        self.kill()
        self.channel.close()
        self._log_file.close()


def free_port() -> int:
    """A port free now on 127.0.0.1 (a restarted server listens where the shim reconnects)."""
    import socket

    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


class AckingClient:
    """Sends whole slices over the raw wire and records what the server acknowledged."""

    def __init__(self, make_slice) -> None:
        self.make_slice = make_slice  # iteration -> penumbra_shim OutgoingSlice
        #: iteration -> outcome name of the answer (accepted, duplicate, skipped).
        self.acked: dict[int, str] = {}
        self.persisted: set[int] = set()

    def send(self, stub, run_id: str, iteration: int, timeout_s: float = 60.0) -> bool:
        """Send one slice; True when answered, False when the server went away mid-call."""
        requests = list(self.make_slice(iteration).requests(run_id, chunk_bytes=64 * 1024))
        try:
            reply = stub.SendSlice(iter(requests), timeout=timeout_s)
        except grpc.RpcError as exc:
            if exc.code() in (grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.CANCELLED, grpc.StatusCode.UNKNOWN):
                return False
            raise
        self.acked[iteration] = pb.SendSliceResponse.Outcome.Name(reply.outcome)
        if reply.persisted:
            self.persisted.add(iteration)
        return True


def check_archive_after_kill(path: Path) -> dict[str, int]:
    """What a reader sees right after a kill: the archive opens in the project's reader, in zarr
    and (default, consolidated) in xarray; xarray shows no row the committed counts do not count;
    no surface row lacks its slice row. Returns the committed row counts."""
    import zarr

    view = open_archive(path)
    rows = view.committed_rows
    slice_iterations = set(view.slices()["iteration"].tolist())
    for label in view.surface_labels:
        orphans = set(view.surface(label)["iteration"].tolist()) - slice_iterations
        assert not orphans, f"surface {label} rows without a slice row: {sorted(orphans)}"
    zarr.open_group(str(path), mode="r")
    try:
        import xarray as xr
    except ImportError:  # optional dependency: the zarr checks above still ran
        return rows
    # Groups the zarr root counts: those first written since the last fold of the archive's
    # journal are in the journal only (the project's reader above merged them).
    folded = zarr.open_group(str(path), mode="r").attrs["committed_rows"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for group_path, count in rows.items():
            if group_path not in folded:
                continue
            ds = xr.open_zarr(str(path), group=group_path)
            lengths = {size for dim, size in ds.sizes.items() if dim in ("time", "point", "forecast", "update",
                                                                          "entry", "region", "window", "event",
                                                                          "range")}
            assert all(n <= count for n in lengths), f"{group_path}: xarray shows {lengths} rows, {count} committed"
    return rows


def check_archive_final(path: Path, iterations: list[int]) -> None:
    """After the run closed: every iteration archived exactly once, processed, with one surface
    row per label; the raw arrays (no consolidated metadata) open in xarray too."""
    view = open_archive(path)
    slices = view.slices()
    got = sorted(slices["iteration"].tolist())
    assert got == sorted(iterations), f"slice rows {got}, expected each of {sorted(iterations)} once"
    assert np.all(slices["outcome"] == 1), slices["outcome"]
    for label in view.surface_labels:
        found = sorted(view.surface(label)["iteration"].tolist())
        if found:
            assert found == sorted(iterations), f"surface {label}: rows for {found}"
    assert view.state == "closed"
    journal = path / "journal"
    assert not journal.exists() or not list(journal.iterdir()), "a closed run's journal is folded and emptied"
    try:
        import xarray as xr
    except ImportError:
        return
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for group_path in view.committed_rows:
            xr.open_zarr(str(path), group=group_path, consolidated=False)
