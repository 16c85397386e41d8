"""Access control with real `penumbra serve` processes on loopback: tokens and roles, writer
tokens across a restart, TLS with client certificates, the refusal to serve beyond loopback
unprotected, and display names that cannot drive a terminal."""

import hashlib
import signal

import grpc
import pytest

import penumbra_shim as ps
from access_support import HOSTILE_NAME, TOKENS, denied, self_signed, small_slice, spec, write_token_file
from penumbra_server.cli.main import main
from penumbra_server.cli.report import load_run, summarise, summary_text
from serve_support import start_serve_args, stop, wait_for_ready

pytestmark = pytest.mark.slow

UNAUTHENTICATED, PERMISSION_DENIED = grpc.StatusCode.UNAUTHENTICATED, grpc.StatusCode.PERMISSION_DENIED


def _serve_from_config(tmp_path, config, ready):
    # The config file names the archive, the workers and the tokens; the command line adds the rest.
    process = start_serve_args(["--config", str(config), "--listen", "127.0.0.1:0", "--ready-file", str(ready)])
    return process, wait_for_ready(ready, process)


def _assert_terminal_safe(text: str) -> None:
    assert not any(c in text for c in "\x1b\x07\r"), repr(text)
    assert "red run" in text


def test_tokens_guard_each_run_and_the_writer_token_survives_a_restart(tmp_path, capsys):
    tokens = write_token_file(tmp_path / "tokens.toml")
    config = tmp_path / "penumbra.toml"
    config.write_text(f'[server]\narchive_root = "archive"\nworkers = 1\n\n[auth]\ntoken_files = ["{tokens.name}"]\n')
    admin_file = tmp_path / "admin.token"
    admin_file.write_text(TOKENS["admin"] + "\n")
    reader_file = tmp_path / "reader.token"
    reader_file.write_text(TOKENS["reader"] + "\n")
    process, address = _serve_from_config(tmp_path, config, tmp_path / "address-1")
    clients = []

    def client(token=None):
        clients.append(ps.connect(address, token=token, retry_budget_s=5.0))
        return clients[-1]

    try:
        anonymous, reader, admin, opener = client(), client(TOKENS["reader"]), client(TOKENS["admin"]), client(TOKENS["opener"])
        error = denied(anonymous.list_runs)
        assert error.code == UNAUTHENTICATED and "admin token" in error.details
        error = denied(reader.list_runs)
        assert error.code == PERMISSION_DENIED and "admin" in error.details and "reader" in error.details
        error = denied(lambda: reader.open_run(spec()))
        assert error.code == PERMISSION_DENIED and "opener" in error.details

        run = opener.open_run(spec(HOSTILE_NAME), cache_results=True)  # the follower reads with the writer token
        writer_token = run.writer_token
        assert writer_token and len(writer_token) >= 32
        assert run.submit(small_slice(1)).result(60).accepted
        other = opener.open_run(spec("another run"), cache_results=False)

        # Another client, with a reader token, a token of another run, or none, cannot write.
        for intruder in (reader, admin, anonymous):
            handle = intruder.attach_run(run.run_id, cache_results=False) if intruder is not anonymous else None
            if handle is not None:
                error = handle.submit(small_slice(2)).exception(60)
                assert error is not None and error.code == PERMISSION_DENIED and "writer token" in error.details
            error = denied(lambda: intruder.close_run(run.run_id))
            assert error.code in (UNAUTHENTICATED, PERMISSION_DENIED) and "writer token" in error.details
        # The writer token of another run opens nothing of this one.
        stranger = client()
        error = denied(lambda: stranger.attach_run(run.run_id, writer_token=other.writer_token, cache_results=False))
        assert error.code == PERMISSION_DENIED and run.run_id in error.details
        error = denied(lambda: stranger.close_run(run.run_id))
        assert error.code == PERMISSION_DENIED and run.run_id in error.details

        # Readers read; admins list.
        assert reader.get_run(run.run_id).run_id == run.run_id
        assert sorted(r.run_id for r in admin.list_runs()) == sorted([run.run_id, other.run_id])
        assert denied(lambda: anonymous.get_run(run.run_id)).code == UNAUTHENTICATED

        # The command line: `runs` needs the admin token; names reach the terminal defanged.
        assert main(["runs", "--server", address, "--timeout", "3"]) == 1
        assert "UNAUTHENTICATED" in capsys.readouterr().err
        assert main(["runs", "--server", address, "--token-file", str(admin_file)]) == 0
        listing = capsys.readouterr().out
        assert run.run_id in listing
        _assert_terminal_safe(listing)
        assert main(["watch", run.run_id, "--server", address, "--token-file", str(reader_file), "--once"]) == 0
        _assert_terminal_safe(capsys.readouterr().out)

        # Only the digest is on disk.
        archive = tmp_path / "archive"
        stored = (archive / f"{run.run_id}.writer-token.sha256").read_text().strip()
        assert stored == hashlib.sha256(writer_token.encode()).hexdigest()
        assert not any(writer_token.encode() in f.read_bytes() for f in archive.rglob("*") if f.is_file())

        run.close(close_run=False, timeout_s=60)
        process.send_signal(signal.SIGTERM)
        assert process.wait(60) == 0
        stop(process)

        # After a restart the writer token still opens the run, and still only that token does.
        process, address = _serve_from_config(tmp_path, config, tmp_path / "address-2")
        resumed_client = client()
        resumed = resumed_client.attach_run(run.run_id, writer_token=writer_token, cache_results=False)
        assert resumed.submit(small_slice(3)).result(60).accepted
        error = client(TOKENS["reader"]).attach_run(run.run_id, cache_results=False).submit(small_slice(4)).exception(60)
        assert error is not None and error.code == PERMISSION_DENIED
        closed = resumed.close(timeout_s=120)
        assert closed.state == "closed"
        _assert_terminal_safe(summary_text(summarise(load_run(closed.archive_path))))
    finally:
        for c in clients:
            c.close()
        stop(process)


def test_tls_with_client_certificates(tmp_path):
    server_cert, server_key = self_signed(tmp_path, "server", ip="127.0.0.1")
    client_cert, client_key = self_signed(tmp_path, "client")
    tokens = write_token_file(tmp_path / "tokens.toml")
    ready = tmp_path / "address"
    process = start_serve_args(["--listen", "127.0.0.1:0", "--archive-root", str(tmp_path / "archive"),
                                "--workers", "1", "--ready-file", str(ready), "--tls-cert", str(server_cert),
                                "--tls-key", str(server_key), "--tls-client-ca", str(client_cert),
                                "--token-file", str(tokens)])
    clients = []
    try:
        address = wait_for_ready(ready, process)
        mutual = ps.channel_credentials(server_cert, certificate_chain=client_cert, private_key=client_key)
        clients.append(plaintext := ps.connect(address, token=TOKENS["admin"], retry_budget_s=2.0, deadline_s=2.0))
        clients.append(no_client_cert := ps.connect(address, token=TOKENS["admin"], root_certificates=server_cert,
                                                    retry_budget_s=2.0, deadline_s=2.0))
        clients.append(admin := ps.connect(address, token=TOKENS["admin"], credentials=mutual))
        clients.append(anonymous := ps.connect(address, credentials=mutual))
        clients.append(opener := ps.connect(address, token=TOKENS["opener"], credentials=mutual))
        # Without TLS, or without a client certificate, the handshake fails: no call gets through.
        assert denied(plaintext.list_runs).code in (grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.DEADLINE_EXCEEDED)
        assert denied(no_client_cert.list_runs).code in (grpc.StatusCode.UNAVAILABLE,
                                                         grpc.StatusCode.DEADLINE_EXCEEDED)
        assert admin.list_runs() == []
        assert denied(anonymous.list_runs).code == UNAUTHENTICATED
        run = opener.open_run(spec(), cache_results=False)
        assert run.submit(small_slice(1)).result(60).accepted
        assert run.close(timeout_s=120).state == "closed"
    finally:
        for c in clients:
            c.close()
        stop(process)
