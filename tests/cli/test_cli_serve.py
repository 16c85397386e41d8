"""`penumbra serve` as a real subprocess: binds loopback, writes its address, stops on SIGTERM."""

import os
import signal
import subprocess
import sys
import time

import pytest

import penumbra_shim as ps
from penumbra_server.cli.main import build_parser, main, parse_address, serve_config_from_args


def _wait_for(path, process, timeout_s=60.0):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if path.exists() and path.read_text().strip():
            return path.read_text().strip()
        assert process.poll() is None, f"serve exited early with status {process.returncode}"
        time.sleep(0.05)
    raise AssertionError("serve did not write its ready file in time")


def test_serve_binds_loopback_answers_and_stops_on_sigterm(tmp_path):
    ready = tmp_path / "address"
    env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONUNBUFFERED="1")
    process = subprocess.Popen(
        [sys.executable, "-m", "penumbra_server.cli.main", "serve", "--listen", "127.0.0.1:0",
         "--archive-root", str(tmp_path / "archive"), "--workers", "1", "--ready-file", str(ready)],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, env=env)
    try:
        address = _wait_for(ready, process)
        host, port = address.rsplit(":", 1)
        assert host == "127.0.0.1" and int(port) > 0
        client = ps.connect(address)
        assert client.list_runs() == []
        client.close()
        process.send_signal(signal.SIGTERM)
        out, _ = process.communicate(timeout=30)
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()
    assert process.returncode == 0
    assert f"serving on {address}" in out and "stopped" in out
    assert not ready.exists()  # removed on shutdown so scripts do not reach a dead server


def test_serve_defaults_to_loopback():
    args = build_parser().parse_args(["serve"])
    assert serve_config_from_args(args)["server"]["listen"].startswith("127.0.0.1:")


@pytest.mark.parametrize("bad", ["localhost", ":50717", "127.0.0.1:http", "127.0.0.1:70000"])
def test_bad_addresses_are_refused_with_the_reason(bad, capsys):
    with pytest.raises(SystemExit) as exc:
        main(["serve", "--listen", bad])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert "--listen" in err and ("HOST:PORT" in err or "port" in err)


def test_parse_address_accepts_ipv6_and_port_zero():
    assert parse_address("[::1]:0") == "[::1]:0"
    assert parse_address("10.0.0.5:50717") == "10.0.0.5:50717"


def test_serve_reports_an_address_it_cannot_bind(tmp_path, capsys):
    # 192.0.2.1 (TEST-NET-1, RFC 5737) is not an address of this machine.
    # --trusted-network: get past the refusal to serve beyond loopback without TLS and tokens.
    status = main(["serve", "--listen", "192.0.2.1:0", "--archive-root", str(tmp_path), "--workers", "1",
                   "--trusted-network"])
    assert status == 1
    assert "cannot serve on 192.0.2.1:0" in capsys.readouterr().err
