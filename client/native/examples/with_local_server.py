"""Run a command against a Penumbra server of its own: start `penumbra serve` on a free loopback
port, run the command with PENUMBRA_SERVER set to the address, stop the server, exit with the
command's status. Used by `make example-c` and `make example-fortran`.

    python client/native/examples/with_local_server.py [--workdir DIR] -- COMMAND [ARGS...]
"""

from __future__ import annotations

import argparse
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

START_TIMEOUT_S = 120.0


def _wait_for_address(ready_file: Path, server: subprocess.Popen) -> str:
    """The address the server wrote once serving; fails loudly if it died or took too long."""
    give_up = time.monotonic() + START_TIMEOUT_S
    while time.monotonic() < give_up:
        if ready_file.exists() and ready_file.read_text().strip():
            return ready_file.read_text().strip()
        if server.poll() is not None:
            raise SystemExit(f"with_local_server: the server exited with status {server.returncode} before serving")
        time.sleep(0.1)
    raise SystemExit(f"with_local_server: the server did not start within {START_TIMEOUT_S:g} s")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workdir", type=Path, default=None,
                        help="directory for the archive and the server log (default: a temporary one)")
    parser.add_argument("--workers", type=int, default=2, help="finder worker processes (default 2)")
    parser.add_argument("command", nargs=argparse.REMAINDER, help="-- COMMAND [ARGS...]")
    args = parser.parse_args(argv)
    command = args.command[1:] if args.command[:1] == ["--"] else args.command
    if not command:
        parser.error("give the command to run after --")
    with tempfile.TemporaryDirectory(prefix="penumbra-example-") as scratch:
        workdir = Path(args.workdir or scratch)
        workdir.mkdir(parents=True, exist_ok=True)
        ready_file = workdir / "server.address"
        ready_file.unlink(missing_ok=True)
        log_path = workdir / "server.log"
        with open(log_path, "w") as log:
            server = subprocess.Popen(
                [sys.executable, "-m", "penumbra_server.cli.main", "serve", "--listen", "127.0.0.1:0",
                 "--archive-root", str(workdir / "archive"), "--workers", str(args.workers),
                 "--ready-file", str(ready_file)], stdout=log, stderr=subprocess.STDOUT)
            try:
                address = _wait_for_address(ready_file, server)
                print(f"with_local_server: server on {address} (log {log_path})", flush=True)
                env = dict(os.environ, PENUMBRA_SERVER=address, PENUMBRA_PYTHON=os.environ.get(
                    "PENUMBRA_PYTHON", sys.executable))
                return subprocess.run(command, env=env).returncode
            finally:
                server.send_signal(signal.SIGTERM)
                try:
                    server.wait(timeout=60)
                except subprocess.TimeoutExpired:
                    server.kill()
                    server.wait()


if __name__ == "__main__":
    sys.exit(main())
