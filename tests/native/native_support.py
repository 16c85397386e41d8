"""Building and running the native programs of tests/native: the library, the examples and the
probes, compiled with the real compilers and run as real processes."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import sysconfig
from pathlib import Path

import pytest

import penumbra_shim as ps

ROOT = Path(__file__).resolve().parents[2]
NATIVE = ROOT / "client" / "native"
PROBES = ("pnl_probe", "pnl_link_probe")


def _shared_libpython() -> bool:
    libdir, name = sysconfig.get_config_var("LIBDIR"), sysconfig.get_config_var("LDLIBRARY") or ""
    return sysconfig.get_config_var("Py_ENABLE_SHARED") == 1 and bool(libdir) and (Path(libdir) / name).exists()


NEEDS_COMPILER = [
    pytest.mark.skipif(shutil.which("gcc") is None, reason="gcc not found on PATH; install it with apt-get install gcc"),
    pytest.mark.skipif(not _shared_libpython(),
                       reason=f"{sys.executable} has no shared libpython to embed; use a python built with "
                              "--enable-shared (distribution, python.org, or pyenv with "
                              "PYTHON_CONFIGURE_OPTS=--enable-shared)"),
]


def env(**extra: str) -> dict:
    """The subprocesses' environment: this checkout's shim, this python, one BLAS thread."""
    shim_root = Path(ps.__file__).resolve().parents[1]
    paths = [str(shim_root)] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]
    return {**os.environ, "PYTHONPATH": os.pathsep.join(paths), "PENUMBRA_PYTHON": sys.executable,
            "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1", **extra}


def make(build: Path, *targets: str) -> None:
    result = subprocess.run(["make", "-C", str(NATIVE), f"PY={sys.executable}", f"BUILD={build}", *targets],
                            capture_output=True, text=True, timeout=600)
    assert result.returncode == 0, f"make {' '.join(targets)} failed:\n{result.stdout}\n{result.stderr}"


def build_all(build: Path) -> Path:
    """The library, its flags helpers, the C example and the probes, built into ``build``."""
    make(build, "lib", "examples-c")
    config = build / "penumbra-link-config"
    flags = subprocess.run([str(config), "--cflags", "--libs"], capture_output=True, text=True, check=True).stdout.split()
    for probe in PROBES:
        result = subprocess.run(["gcc", "-std=c11", "-Wall", "-Wextra", "-Werror", "-o", str(build / probe),
                                 str(ROOT / "tests" / "native" / f"{probe}.c"), *flags, "-lm"],
                                capture_output=True, text=True, timeout=120)
        assert result.returncode == 0, f"building {probe} with penumbra-link-config's flags failed:\n{result.stderr}"
    return build


def run(args, *, timeout: float = 900, environment: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([str(a) for a in args], capture_output=True, text=True, timeout=timeout,
                          env=environment or env())


def probe_cases(stdout: str) -> dict[str, tuple[str, str]]:
    """case name -> (status name, message) from the probes' report lines (the last of a name wins)."""
    cases = {}
    for line in stdout.splitlines():
        match = re.match(r"case=(\S+) status=(\S+) elapsed_s=(\S+) message=(.*)$", line)
        if match:
            cases[match[1]] = (match[2], match[4])
    return cases


def elapsed(stdout: str, case: str) -> float:
    return float(re.search(rf"^case={case} .*elapsed_s=(\S+)", stdout, re.M)[1])


def link_lines(stdout: str) -> dict[str, dict[str, str]]:
    """link name -> its fields, from the link probe's "link=NAME key=value ..." lines."""
    out = {}
    for line in stdout.splitlines():
        if line.startswith("link="):
            fields = dict(item.split("=", 1) for item in line.split())
            out[fields.pop("link")] = fields
    return out
