"""The link of the C interface, as an evolution code meets it (tests/native/pnl_link_probe.c run
as a real process):

* Nobody serves the address: connecting and opening return PNL_PENDING within a generous bound
  of the timeout, with usable handles; slices submitted meanwhile are queued or dropped (keep
  newest) and counted; reads say "nothing yet"; closing a run that never opened is
  PNL_UNAVAILABLE. Nothing crashes.
* The server comes up later on that same port: the pending run opens by itself, the queued
  slices and the later ones are processed, and the outage is recorded on the server.
* TLS with client certificates and tokens (`penumbra serve` with a self-signed certificate made
  by the openssl command line): one process opens with an opener token, hands over the run id
  and writer token, a second attaches with them; without a token the refusals name the token needed.
"""

from __future__ import annotations

import queue
import re
import shutil
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

import penumbra_shim as ps
from native_support import NEEDS_COMPILER, elapsed, env, link_lines, probe_cases, run
from penumbra_server.server import BackgroundServer

pytestmark = NEEDS_COMPILER

DEADLINE_S = 300.0  # generous: every wait below fails loudly after it


def _check(cases: dict, case: str, status: str, *words: str) -> str:
    assert case in cases, f"probe case {case} did not report"
    got, message = cases[case]
    assert got == status, (case, got, message)
    for word in words:
        assert word in message, (case, word, message)
    return message


def test_unreachable_server_gives_pending_handles_that_take_and_count_slices(build):
    with socket.socket() as holder:  # a port that is bound but never listens: connections are refused
        holder.bind(("127.0.0.1", 0))
        address = f"127.0.0.1:{holder.getsockname()[1]}"
        timeout_s = 1.5
        result = run([build / "pnl_link_probe", "unreachable", address, timeout_s], timeout=300)
    assert result.returncode == 0, f"the probe did not finish normally:\n{result.stdout}\n{result.stderr}"
    out, cases = result.stdout, probe_cases(result.stdout)
    _check(cases, "init", "PNL_OK")
    _check(cases, "connect", "PNL_PENDING", address, "keeps trying")
    _check(cases, "open_run", "PNL_PENDING", "not open yet", "pnl_link_stats")
    for case in ("connect", "open_run", "attach_run"):  # the timeout, plus a generous allowance for a busy machine
        assert elapsed(out, case) < timeout_s + 20.0, f"{case} blocked {elapsed(out, case):.1f} s"
    assert "connection_is_null=0" in out and "run_is_null=0" in out
    _check(cases, "run_id", "PNL_PENDING", "not open yet")
    _check(cases, "writer_token", "PNL_PENDING")
    assert "run_id=[]" in out and "writer_token=[]" in out  # "" while unknown, not the caller's old text
    for it in range(4):
        _check(cases, f"submit_{it}", "PNL_OK")
    links = link_lines(out)
    assert links["fresh"]["state"] == "0" and links["fresh"]["submitted"] == "0", links["fresh"]
    # queue_depth=2 in the spec: of 4 slices the newest 2 wait, the 2 oldest were dropped (link down).
    pending = links["after_submits"]
    assert (pending["state"], pending["link_up"], pending["submitted"], pending["sent"], pending["queued"],
            pending["dropped"], pending["dropped_link_down"]) == ("0", "0", "4", "0", "2", "2", "2"), pending
    _check(cases, "guidance", "PNL_NOT_FOUND", "no guidance yet", "not open yet")
    _check(cases, "surfaces", "PNL_OK")
    assert "surface_count=0" in out
    _check(cases, "flush", "PNL_TIMEOUT", "not open yet", "2 slice(s) still pending")
    _check(cases, "wait_surfaces", "PNL_TIMEOUT", "not open yet")
    _check(cases, "attach_run", "PNL_PENDING", "run-0123456789ab")
    _check(cases, "attached_submit", "PNL_OK")  # the variable set comes from the fields until the server answers
    _check(cases, "attached_run_id", "PNL_OK")
    assert "attached_run_id=[run-0123456789ab]" in out
    assert links["attached"]["queued"] == "1" and links["attached"]["state"] == "0", links["attached"]
    _check(cases, "attached_close", "PNL_UNAVAILABLE", "never opened", "1 of its 1")
    _check(cases, "run_close", "PNL_UNAVAILABLE", "never opened", "4 of its 4")
    _check(cases, "disconnect", "PNL_OK")


class _Lines:
    """A process's stdout lines, read by a thread so that waiting for one has a deadline."""

    def __init__(self, process: subprocess.Popen) -> None:
        self.seen: list[str] = []
        self._lines: queue.Queue = queue.Queue()
        threading.Thread(target=self._read, args=(process,), daemon=True).start()

    def _read(self, process: subprocess.Popen) -> None:
        for line in process.stdout:
            self._lines.put(line)
        self._lines.put(None)

    def wait_for(self, text: str, timeout_s: float) -> None:
        give_up = time.monotonic() + timeout_s
        while True:
            try:
                line = self._lines.get(timeout=max(0.0, give_up - time.monotonic()))
            except queue.Empty:
                line = None
            if line is None:
                raise AssertionError(f"the probe never printed {text!r}:\n{''.join(self.seen)}")
            self.seen.append(line)
            if line.strip() == text:
                return

    def rest(self) -> str:
        while (line := self._lines.get(timeout=DEADLINE_S)) is not None:
            self.seen.append(line)
        return "".join(self.seen)


@pytest.mark.slow
def test_a_pending_run_opens_when_the_server_comes_up_on_its_port(build, tmp_path):
    holder = socket.socket()  # holds the port until the probe is pending, so no one else takes it
    holder.bind(("127.0.0.1", 0))
    port = holder.getsockname()[1]
    address = f"127.0.0.1:{port}"
    process = subprocess.Popen([str(build / "pnl_link_probe"), "pending-then-open", address, "1.5"],
                               stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, env=env())
    try:
        lines = _Lines(process)
        lines.wait_for("waiting_for_server", DEADLINE_S)
        holder.close()
        with BackgroundServer(address, archive_root=tmp_path / "archive", workers=1) as server:
            assert process.wait(timeout=900) == 0, f"the probe failed:\n{lines.rest()}"
            out = lines.rest()
            with ps.connect(server.address, deadline_s=20.0) as client:
                run_id = re.search(r"^run_id=(\S+)$", out, re.M)[1]
                info = client.get_run(run_id)
                gaps = [e.gap for e in client.watch(run_id, timeout_s=60) if e.kind == "client_gap_recorded"]
    finally:
        holder.close()
        if process.poll() is None:
            process.kill()
            process.wait()
    cases, links = probe_cases(out), link_lines(out)
    _check(cases, "connect", "PNL_PENDING")
    _check(cases, "open_run", "PNL_PENDING")
    assert links["pending"]["state"] == "0" and links["pending"]["queued"] == "2", links["pending"]
    assert links["opened"]["state"] == "1", links["opened"]
    for case in ("flush_queued", "open_submit", "flush", "wait_surfaces", "surfaces", "run_id", "run_close",
                 "disconnect"):
        _check(cases, case, "PNL_OK")
    # Sent: the two newest pending slices (2, 3) and the two after opening (10, 11); dropped: 0, 1.
    final = links["final"]
    assert (final["state"], final["submitted"], final["sent"], final["dropped"], final["dropped_link_down"],
            final["queued"], final["refused"], final["gaps_recorded"]) == ("1", "6", "4", "2", "2", "0", "0", "1"), final
    surface = re.search(r"^surface count=1 label=A found_iteration=(\d+) irreducible_mass=(\S+)$", out, re.M)
    assert surface is not None and int(surface[1]) == 11, out
    # One puncture of mass 1: a Schwarzschild horizon, area 16 pi M^2, so M_irr = M = 1
    # (isotropic radius M/2; Misner, Thorne & Wheeler, Gravitation, 1973; from memory).
    assert float(surface[2]) == pytest.approx(1.0, rel=0.01)
    assert info.state == "closed" and info.slices_received == 4 and info.client_gaps_recorded == 1, info
    assert len(gaps) == 1 and gaps[0].slices_dropped == 2 and gaps[0].iterations == ((0, 1),), gaps


# -- TLS and tokens ------------------------------------------------------------------------------

TOKENS = {"admin": "admin-token-for-the-native-tests-01", "opener": "opener-token-for-the-native-tests-02"}


def _certificate(directory: Path, name: str, *, ip: str | None = None) -> tuple[Path, Path]:
    """A self-signed certificate and its key (P-256), made with the openssl command-line tool."""
    openssl = shutil.which("openssl")
    if openssl is None:
        pytest.skip("the openssl command is not on PATH to make a certificate; install it with apt-get install openssl")
    cert, key = directory / f"{name}.crt", directory / f"{name}.key"
    command = [openssl, "req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes",
               "-keyout", str(key), "-out", str(cert), "-days", "2", "-subj", f"/CN={name}"]
    if ip is not None:
        command += ["-addext", f"subjectAltName=IP:{ip}"]
    subprocess.run(command, check=True, capture_output=True, timeout=60)
    return cert, key


def _serve_with_tls_and_tokens(tmp_path: Path, server_cert: Path, server_key: Path, client_ca: Path):
    tokens = tmp_path / "tokens.toml"
    tokens.write_text("".join(f'[[token]]\nname = "{role}"\nrole = "{role}"\ntoken = "{token}"\n\n'
                              for role, token in TOKENS.items()))
    ready = tmp_path / "address"
    process = subprocess.Popen(
        [sys.executable, "-m", "penumbra_server.cli.main", "serve", "--listen", "127.0.0.1:0", "--archive-root",
         str(tmp_path / "archive"), "--workers", "1", "--ready-file", str(ready), "--tls-cert", str(server_cert),
         "--tls-key", str(server_key), "--tls-client-ca", str(client_ca), "--token-file", str(tokens)],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, env=env())
    give_up = time.monotonic() + DEADLINE_S
    while not (ready.exists() and ready.read_text().strip()):
        if process.poll() is not None:
            raise AssertionError(f"serve exited with status {process.returncode}:\n{process.stdout.read()}")
        if time.monotonic() > give_up:
            process.kill()
            raise AssertionError(f"serve did not write its ready file within {DEADLINE_S:g} s")
        time.sleep(0.05)
    return process, ready.read_text().strip()


@pytest.mark.slow
def test_tls_and_tokens_from_c_open_hand_over_the_writer_token_and_attach(build, tmp_path):
    server_cert, server_key = _certificate(tmp_path, "server", ip="127.0.0.1")
    client_cert, client_key = _certificate(tmp_path, "client")
    opener_file = tmp_path / "opener.token"
    opener_file.write_text(TOKENS["opener"] + "\n")
    process, address = _serve_with_tls_and_tokens(tmp_path, server_cert, server_key, client_cert)
    tls = f"tls_ca={server_cert}; tls_cert={client_cert}; tls_key={client_key}"
    try:
        opened = run([build / "pnl_link_probe", "secure-open", address, f"{tls}; token_file={opener_file}"],
                     timeout=900)
        assert opened.returncode == 0, f"secure-open failed:\n{opened.stdout}\n{opened.stderr}"
        cases = probe_cases(opened.stdout)
        for case in ("connect", "open_run", "submit", "flush", "run_id", "writer_token", "run_close", "disconnect"):
            _check(cases, case, "PNL_OK")
        run_id = re.search(r"^run_id=(\S+)$", opened.stdout, re.M)[1]
        writer_token = re.search(r"^writer_token=(\S+)$", opened.stdout, re.M)[1]
        assert len(writer_token) >= 32

        # TLS but no token: the connection is fine, the calls say which token they need.
        refused = run([build / "pnl_link_probe", "secure-refusals", address, tls, run_id], timeout=900)
        assert refused.returncode == 0, f"secure-refusals failed:\n{refused.stdout}\n{refused.stderr}"
        cases = probe_cases(refused.stdout)
        _check(cases, "connect", "PNL_OK")
        _check(cases, "open_without_token", "PNL_UNAUTHENTICATED", "opener or admin token", "token_file")
        assert "run_is_null=1" in refused.stdout
        _check(cases, "attach_without_token", "PNL_UNAUTHENTICATED", "writer token")
        _check(cases, "attach_with_wrong_token", "PNL_PERMISSION_DENIED", run_id, "writer token")
        _check(cases, "open_with_unknown_token", "PNL_PERMISSION_DENIED", "opener or admin token")
        assert "not-a-configured-token" not in refused.stdout  # tokens are never echoed

        # Another rank: attaches with the handed-over writer token and sends its slice.
        attached = run([build / "pnl_link_probe", "secure-attach", address, tls, run_id, writer_token], timeout=900)
        assert attached.returncode == 0, f"secure-attach failed:\n{attached.stdout}\n{attached.stderr}"
        cases = probe_cases(attached.stdout)
        for case in ("connect", "attach_run", "submit", "flush", "wait_surfaces", "run_close", "disconnect"):
            _check(cases, case, "PNL_OK")
        final = link_lines(attached.stdout)["final"]
        assert final["sent"] == "1" and final["refused"] == "0", final

        credentials = ps.channel_credentials(server_cert, certificate_chain=client_cert, private_key=client_key)
        with ps.connect(address, token=TOKENS["admin"], credentials=credentials, deadline_s=20.0) as client:
            info = client.get_run(run_id)
        assert info.state == "closed" and info.slices_received == 2, info
    finally:
        if process.poll() is None:
            process.kill()
        process.wait(timeout=60)
