"""Starting `penumbra serve` as a real subprocess, and looking at processes through /proc."""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

SERVE = [sys.executable, "-m", "penumbra_server.cli.main", "serve"]


def serve_env() -> dict:
    return dict(os.environ, OMP_NUM_THREADS="1", PYTHONUNBUFFERED="1")


def start_serve(tmp_path: Path, *args: str, archive: Path | None = None, ready: Path | None = None,
                listen: str = "127.0.0.1:0", workers: int = 1) -> tuple[subprocess.Popen, Path]:
    """Popen `penumbra serve` on ``listen`` with a ready file; returns (process, ready file)."""
    ready = ready or tmp_path / f"address-{time.monotonic_ns()}"
    archive = archive or tmp_path / "archive"
    command = SERVE + ["--listen", listen, "--archive-root", str(archive), "--workers", str(workers),
                       "--ready-file", str(ready), *args]
    process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, env=serve_env())
    return process, ready


def start_serve_args(args: list[str]) -> subprocess.Popen:
    """Popen `penumbra serve` with exactly ``args``."""
    return subprocess.Popen(SERVE + list(args), stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                            env=serve_env())


def wait_for_ready(path: Path, process: subprocess.Popen, timeout_s: float = 60.0) -> str:
    """The address written to the ready file; fails loudly if serve exits or takes too long."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if path.exists() and path.read_text().strip():
            return path.read_text().strip()
        if process.poll() is not None:
            out = process.stdout.read() if process.stdout else ""
            raise AssertionError(f"serve exited early with status {process.returncode}:\n{out}")
        time.sleep(0.05)
    raise AssertionError(f"serve did not write its ready file {path} within {timeout_s} s")


def stop(process: subprocess.Popen) -> str:
    """Kill the process if it still runs; return its output (or "" if an orphaned child of it
    still holds its stdout open)."""
    if process.poll() is None:
        process.kill()
    process.wait(timeout=30)
    try:
        out, _ = process.communicate(timeout=10)
    except subprocess.TimeoutExpired:
        process.stdout.close()
        return ""
    return out or ""


def kill_all(processes: dict[int, int]) -> None:
    """SIGKILL those of ``processes`` ({pid: start time}) that still run (cleanup after a failure)."""
    for pid in alive(processes):
        try:
            os.kill(pid, 9)
        except ProcessLookupError:
            pass


def _stat(pid: int) -> tuple[str, int, int] | None:
    """(state, parent pid, start time in ticks) of ``pid``, or None if it does not exist."""
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except (FileNotFoundError, ProcessLookupError):
        return None
    fields = text[text.rindex(")") + 2:].split()  # after "pid (comm) "
    return fields[0], int(fields[1]), int(fields[19])


def cmdline(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
    except (FileNotFoundError, ProcessLookupError):
        return ""


def children_of(pid: int) -> dict[int, int]:
    """Living children of ``pid``: {child pid: start time} (start time tells a reused pid apart)."""
    found = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            stat = _stat(int(entry))
            if stat is not None and stat[1] == pid and stat[0] != "Z":
                found[int(entry)] = stat[2]
    return found


def alive(processes: dict[int, int]) -> dict[int, int]:
    """Those of ``processes`` ({pid: start time}) that still run (zombies count as ended)."""
    still = {}
    for pid, started in processes.items():
        stat = _stat(pid)
        if stat is not None and stat[2] == started and stat[0] != "Z":
            still[pid] = started
    return still


def outlived(processes: dict[int, int], timeout_s: float) -> dict[int, int]:
    """Those of ``processes`` still running after waiting up to ``timeout_s`` for all to end
    (a deadline for a hang: returns as soon as none is left)."""
    deadline = time.monotonic() + timeout_s
    remaining = alive(processes)
    while remaining and time.monotonic() < deadline:
        time.sleep(0.05)
        remaining = alive(processes)
    return remaining
