"""`penumbra serve --slices-in-flight`: the option, its config-file form, and bad values named."""

import asyncio
import tomllib

import pytest

from penumbra_server.cli.main import main
from penumbra_server.server import ServerOptions, create_server


def _print_config(capsys, *args) -> dict:
    assert main(["serve", *args, "--print-config"]) == 0
    return tomllib.loads(capsys.readouterr().out)


def test_slices_in_flight_from_the_command_line_and_the_config_file(tmp_path, capsys):
    assert _print_config(capsys)["options"]["slices_in_flight"] == 1  # one slice at a time by default
    assert _print_config(capsys, "--slices-in-flight", "3")["options"]["slices_in_flight"] == 3
    config = tmp_path / "penumbra.toml"
    config.write_text('[options]\nslices_in_flight = 2\n')
    assert _print_config(capsys, "--config", str(config))["options"]["slices_in_flight"] == 2
    assert _print_config(capsys, "--config", str(config), "--slices-in-flight", "4")["options"]["slices_in_flight"] == 4


def test_no_slices_in_flight_is_refused_with_the_field_named(tmp_path, capsys):
    with pytest.raises(SystemExit):
        main(["serve", "--slices-in-flight", "0", "--print-config"])
    assert "--slices-in-flight" in capsys.readouterr().err
    with pytest.raises(ValueError, match="slices_in_flight"):
        asyncio.run(create_server(archive_root=tmp_path, options=ServerOptions(slices_in_flight=0)))
