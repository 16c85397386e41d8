"""`penumbra serve` configuration: the TOML file, command-line overrides, --print-config, and
the refusal to listen beyond loopback without TLS and tokens."""

import tomllib

import pytest

from access_support import write_token_file
from penumbra_server.cli.main import main
from penumbra_server.server.auth import ExposureError, check_exposure
from penumbra_server.server.tokens import TokenBook
from serve_support import start_serve_args


def _print_config(capsys, *args) -> dict:
    assert main(["serve", *args, "--print-config"]) == 0
    return tomllib.loads(capsys.readouterr().out)


def test_config_file_values_and_command_line_overrides(tmp_path, capsys):
    config = tmp_path / "etc" / "penumbra.toml"
    config.parent.mkdir()
    config.write_text(
        '[server]\nlisten = "127.0.0.1:6000"\narchive_root = "archive"\nworkers = 3\ngrace_s = 9.5\n\n'
        '[tls]\ncertificate = "tls/server.crt"\nprivate_key = "tls/server.key"\n\n'
        '[auth]\ntoken_files = ["tokens.toml"]\n\n'
        '[options]\nmax_slice_bytes = 1048576\ncommon_horizon = false\n')
    from_file = _print_config(capsys, "--config", str(config))
    assert from_file["server"]["listen"] == "127.0.0.1:6000"
    assert from_file["server"]["workers"] == 3 and from_file["server"]["grace_s"] == 9.5
    # Relative paths in the file are relative to the file.
    assert from_file["server"]["archive_root"] == str(config.parent / "archive")
    assert from_file["tls"]["certificate"] == str(config.parent / "tls" / "server.crt")
    assert "client_ca" not in from_file["tls"]
    assert from_file["auth"]["token_files"] == [str(config.parent / "tokens.toml")]
    assert from_file["options"]["max_slice_bytes"] == 1048576 and from_file["options"]["common_horizon"] is False

    overridden = _print_config(capsys, "--config", str(config), "--listen", "127.0.0.1:0", "--workers", "1",
                               "--option", "max_slice_bytes=2048", "--trusted-network")
    assert overridden["server"]["listen"] == "127.0.0.1:0" and overridden["server"]["workers"] == 1
    assert overridden["server"]["trusted_network"] is True
    assert overridden["options"]["max_slice_bytes"] == 2048
    assert overridden["server"]["grace_s"] == 9.5  # not overridden: the file's value stays

    # What --print-config prints is a config file giving the same configuration.
    printed = tmp_path / "printed.toml"
    assert main(["serve", "--config", str(config), "--workers", "2", "--print-config"]) == 0
    printed.write_text(capsys.readouterr().out)
    assert main(["serve", "--config", str(printed), "--print-config"]) == 0
    assert tomllib.loads(capsys.readouterr().out) == tomllib.loads(printed.read_text())


@pytest.mark.parametrize("text, named", [
    ('[server]\nworkers = "many"\n', "server.workers"),
    ('[server]\nlisten_on = "x"\n', "server.listen_on"),
    ('[tsl]\ncertificate = "a"\n', "[tsl]"),
    ('[options]\nmax_slice_bytes = true\n', "options.max_slice_bytes"),
])
def test_bad_config_values_are_named(tmp_path, capsys, text, named):
    config = tmp_path / "bad.toml"
    config.write_text(text)
    assert main(["serve", "--config", str(config), "--print-config"]) == 2
    assert named in capsys.readouterr().err


def test_bad_token_files_are_named(tmp_path):
    path = tmp_path / "tokens.toml"
    path.write_text('[[token]]\nname = "x"\nrole = "superuser"\ntoken = "0123456789abcdef0123"\n')
    with pytest.raises(ValueError, match=r"token\[0\]\.role"):
        TokenBook.from_file(path)
    path.write_text('[[token]]\nname = "x"\nrole = "reader"\nsha256 = "abc"\n')
    with pytest.raises(ValueError, match=r"token\[0\]\.sha256"):
        TokenBook.from_file(path)
    book = TokenBook.from_file(write_token_file(path))
    assert [e.role for e in book.entries] == ["admin", "reader", "opener"]
    assert book.lookup("not a token of this book") is None


@pytest.mark.parametrize("host", ["127.0.0.1", "127.3.2.1", "::1", "localhost"])
def test_loopback_needs_nothing(host):
    check_exposure(host, tls=False, tokens=False, trusted_network=False)


@pytest.mark.parametrize("host", ["0.0.0.0", "::", "10.1.2.3", "node17.cluster"])
def test_beyond_loopback_needs_tls_and_tokens_or_a_trusted_network(host):
    for tls, tokens in ((False, False), (True, False), (False, True)):
        with pytest.raises(ExposureError, match="--trusted-network"):
            check_exposure(host, tls=tls, tokens=tokens, trusted_network=False)
    check_exposure(host, tls=True, tokens=True, trusted_network=False)
    check_exposure(host, tls=False, tokens=False, trusted_network=True)


def test_serve_refuses_a_wildcard_bind_without_tls_and_tokens(tmp_path):
    # The refusal comes before any socket is bound and before any worker starts.
    process = start_serve_args(["--listen", "0.0.0.0:0", "--archive-root", str(tmp_path / "archive"),
                                "--workers", "1", "--token-file", str(write_token_file(tmp_path / "tokens.toml"))])
    out, _ = process.communicate(timeout=120)
    assert process.returncode == 2, out
    assert "refusing to serve on 0.0.0.0:0" in out and "TLS" in out and "--trusted-network" in out
    assert "tokens (--token-file)" not in out  # tokens were given: only TLS is missing


def test_token_command_appends_a_digest_the_server_reads(tmp_path, capsys):
    path = tmp_path / "tokens.toml"
    assert main(["token", "--role", "reader", "--name", "alice", "--token-file", str(path)]) == 0
    first = capsys.readouterr().out.strip()
    assert main(["token", "--role", "admin", "--name", "ops", "--token-file", str(path)]) == 0
    second = capsys.readouterr().out.strip()
    assert first != second and len(first) >= 40
    assert first not in path.read_text() and second not in path.read_text()
    assert oct(path.stat().st_mode & 0o777) == oct(0o600)
    book = TokenBook.from_file(path)
    assert (book.lookup(first).name, book.lookup(first).role) == ("alice", "reader")
    assert book.lookup(second).role == "admin"
    assert main(["token", "--role", "reader", "--name", "bad name!", "--token-file", str(path)]) == 2
    assert "--name" in capsys.readouterr().err


def test_the_deploy_config_names_tls_and_tokens(capsys):
    from pathlib import Path

    deploy = Path(__file__).resolve().parents[2] / "deploy"
    config = _print_config(capsys, "--config", str(deploy / "penumbra.toml"))
    assert config["server"]["listen"].startswith("0.0.0.0:") and config["server"]["trusted_network"] is False
    assert config["tls"]["certificate"] == str(deploy / "secrets" / "server.crt")
    assert config["auth"]["token_files"] == [str(deploy / "secrets" / "tokens.toml")]
