"""How long a submit blocks the caller, C (libpenumbra_link) against Python (the shim), side by
side in one run: prints figures, asserts nothing (run: python tests/benchmarks/bench_native_submit.py).

Both callers are separate processes submitting the same slices (3 patches, 11.8 MiB of float64)
to one loopback server whose run body lies outside the data (no finder work competes). The C
call wraps the caller's arrays without a copy and hands them to the same shim code, so the ratio
shows what the C layer costs on top of the shim's own validation and copy. ``--gap`` seconds pass between submits (the evolution
computing); with no gap the C caller must take the GIL back from the busy sender thread on
every call, which a Python caller (holding it throughout) does not.
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

import penumbra_shim as ps
from penumbra_server.server import BackgroundServer

ROOT = Path(__file__).resolve().parents[2]
SHAPES = ((69, 25, 25), (35, 35, 35), (35, 35, 35))


def _python_caller(address: str, slices: int, gap_s: float, out) -> None:
    names = ps.required_fields("adm")
    patches = []
    for p, shape in enumerate(SHAPES):
        one, zero = np.ones(shape), np.zeros(shape)
        fields = {n: (one if n in ("gamma_xx", "gamma_yy", "gamma_zz") else zero) for n in names}
        patches.append(ps.PatchData(origin=(-1.0 + p, -0.6, -0.6), spacing=(0.05,) * 3, fields=fields, level=int(p > 0)))
    with ps.connect(address, deadline_s=30.0) as client:
        run = client.open_run(ps.RunSpec(variable_set="adm", bodies=[ps.Body("A", (500, 500, 500), 1.0)],
                                         name="python submit timing", backlog=ps.BacklogOptions(queue_depth=2)))
        blocked = []
        for n in range(slices):
            start = time.perf_counter()
            run.submit_arrays(time=0.1 * n, iteration=n, patches=patches)
            blocked.append(time.perf_counter() - start)
            time.sleep(gap_s)
        run.close(timeout_s=300)
    out.send(blocked)


def _summary(name: str, blocked: list[float]) -> float:
    """Prints the first submit apart (it pays one-time start-up costs) and median / max of the rest."""
    rest = blocked[1:]
    median = statistics.median(rest)
    print(f"{name:>9}: first {1e3 * blocked[0]:7.2f} ms; then median {1e3 * median:7.2f} ms, "
          f"max {1e3 * max(rest):7.2f} ms over {len(rest)} submits")
    return median


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--slices", type=int, default=30)
    parser.add_argument("--gap", type=float, nargs="+", default=[0.0, 0.3],
                        help="seconds between submits, one measurement per value (default 0 and 0.3)")
    args = parser.parse_args()
    env = dict(os.environ, PENUMBRA_PYTHON=sys.executable,
               PYTHONPATH=os.pathsep.join([str(Path(ps.__file__).resolve().parents[1]), os.environ.get("PYTHONPATH", "")]))
    with tempfile.TemporaryDirectory() as scratch:
        build = Path(scratch) / "build"
        subprocess.run(["make", "-s", "-C", str(ROOT / "client" / "native"), f"PY={sys.executable}", f"BUILD={build}", "lib"],
                       check=True)
        flags = subprocess.run([str(build / "penumbra-link-config"), "--cflags", "--libs"], check=True,
                               capture_output=True, text=True).stdout.split()
        program = build / "native_submit_timing"
        subprocess.run(["gcc", "-O2", "-o", str(program), str(Path(__file__).with_name("native_submit_timing.c")), *flags],
                       check=True)
        mib = sum(12 * 8 * int(np.prod(s)) for s in SHAPES) / 2**20
        print(f"submit blocking, slices of {mib:.1f} MiB (3 patches, 12 float64 fields), loopback server:")
        with BackgroundServer("127.0.0.1:0", archive_root=Path(scratch) / "archive", workers=1) as server:
            for gap_s in args.gap:
                c_out = subprocess.run([str(program), server.address, str(args.slices), str(gap_s)], env=env,
                                       check=True, capture_output=True, text=True).stdout
                c_blocked = [float(line.split("=")[1]) for line in c_out.splitlines() if line.startswith("blocked_s=")]
                receiver, sender = multiprocessing.get_context("spawn").Pipe(duplex=False)
                caller = multiprocessing.get_context("spawn").Process(
                    target=_python_caller, args=(server.address, args.slices, gap_s, sender))
                caller.start()
                py_blocked = receiver.recv()
                caller.join()
                print(f"gap between submits {gap_s:g} s:")
                c_median = _summary("C", c_blocked)
                py_median = _summary("Python", py_blocked)
                print(f"  ratio C / Python (medians): {c_median / py_median:.2f}")


if __name__ == "__main__":
    main()
