"""Choosing the finder engine: `penumbra serve --engine dask ...` and the config's [dask] table,
checked with errors that name the setting; the process engine never imports Dask."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from penumbra_server.cli.main import build_parser, main, serve_config_from_args
from penumbra_server.server.config import (ConfigError, engine_settings, format_toml, load_config_file)


def _engine(argv):
    return engine_settings(serve_config_from_args(build_parser().parse_args(["serve", *argv])))


def test_the_process_engine_is_the_default():
    settings = _engine(["--workers", "3"])
    assert (settings.engine, settings.workers, settings.dask_scheduler, settings.dask_local_workers) == \
        ("process", 3, None, 0)


def test_command_line_chooses_a_scheduler_or_a_local_cluster():
    remote = _engine(["--engine", "dask", "--dask-scheduler", "tcp://node17:8786"])
    assert (remote.engine, remote.dask_scheduler, remote.dask_local_workers) == ("dask", "tcp://node17:8786", 0)
    assert remote.describe() == "dask scheduler tcp://node17:8786"
    local = _engine(["--engine", "dask", "--dask-local-workers", "2"])
    assert (local.engine, local.dask_scheduler, local.dask_local_workers) == ("dask", None, 2)


def test_config_file_chooses_dask_and_the_command_line_overrides_it(tmp_path):
    path = tmp_path / "penumbra.toml"
    path.write_text('[server]\nengine = "dask"\n\n[dask]\nscheduler = "tls://10.0.0.5:8786"\nresubmissions = 4\n')
    settings = _engine(["--config", str(path)])
    assert (settings.engine, settings.dask_scheduler, settings.resubmissions, settings.task_retries) == \
        ("dask", "tls://10.0.0.5:8786", 4, 1)
    # A local cluster on the command line replaces the file's scheduler (not both at once).
    local = _engine(["--config", str(path), "--dask-local-workers", "2"])
    assert (local.dask_scheduler, local.dask_local_workers) == (None, 2)
    # The printed configuration reads back to the same settings.
    printed = tmp_path / "printed.toml"
    printed.write_text(format_toml(serve_config_from_args(build_parser().parse_args(["serve", "--config", str(path)]))))
    again = engine_settings(load_config_file(printed))
    assert again == settings


@pytest.mark.parametrize("argv, names", [
    (["--engine", "dask"], "dask.scheduler, dask.local_workers: engine \"dask\" needs exactly one"),
    (["--dask-scheduler", "tcp://h:8786"], "dask.scheduler: set, but server.engine is \"process\""),
    (["--engine", "dask", "--dask-scheduler", "node17"], "dask.scheduler: expected PROTOCOL://HOST:PORT"),
    (["--engine", "dask", "--dask-scheduler", "http://node17:8786"], "dask.scheduler: expected PROTOCOL://HOST:PORT"),
])
def test_inconsistent_engine_settings_are_refused_naming_the_setting(argv, names):
    with pytest.raises(ConfigError) as info:
        _engine(argv)
    assert names in str(info.value)


def test_both_dask_options_on_the_command_line_are_refused(capsys):
    assert main(["serve", "--engine", "dask", "--dask-scheduler", "tcp://h:8786", "--dask-local-workers", "2"]) == 2
    assert "--dask-scheduler, --dask-local-workers: give one of them" in capsys.readouterr().err


def test_bad_dask_values_in_the_config_file_name_the_key(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text('[dask]\nlocal_workers = "two"\n')
    with pytest.raises(ConfigError, match=r"dask.local_workers: expected an integer"):
        load_config_file(path)
    path.write_text('[server]\nengine = "threads"\n')
    with pytest.raises(ConfigError, match=r"server.engine: expected one of process, dask, got 'threads'"):
        engine_settings(load_config_file(path))
    path.write_text('[dask]\nresubmissions = -1\n')
    with pytest.raises(ConfigError, match=r"dask.resubmissions: expected 0 or more"):
        engine_settings(load_config_file(path))


def test_serve_refuses_a_bad_engine_setting_before_starting_anything(tmp_path, capsys):
    status = main(["serve", "--listen", "127.0.0.1:0", "--archive-root", str(tmp_path / "archive"), "--engine", "dask"])
    assert status == 2
    assert "needs exactly one" in capsys.readouterr().err
    assert not (tmp_path / "archive").exists()


def test_the_process_engine_never_imports_dask():
    # Any import of dask or distributed fails in this child, as if they were not installed.
    script = """
import asyncio, sys
class Refuse:
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in ("dask", "distributed"):
            raise ImportError(f"No module named {name!r} (refused by the test)")
sys.meta_path.insert(0, Refuse())
from penumbra_server.cli import main, serve
from penumbra_server.server import create_server
from penumbra_server.server.executors import EngineSettings, start_executor

async def go():
    executor = await start_executor(EngineSettings(engine="process", workers=1))
    print("process workers:", len(executor.worker_pids))
    await executor.close()
    try:
        await start_executor(EngineSettings(engine="dask", dask_local_workers=1))
    except RuntimeError as err:
        print("refused:", err)
asyncio.run(go())
print("loaded:", sorted(m for m in sys.modules if m.split(".")[0] in ("dask", "distributed")))
"""
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120,
                          env=dict(os.environ, OMP_NUM_THREADS="1"))
    assert done.returncode == 0, done.stderr
    assert "process workers: 1" in done.stdout
    assert "loaded: []" in done.stdout
    assert "refused: engine dask: the 'distributed' package is not installed" in done.stdout
    assert "pip install 'penumbra-horizons[dask]'" in done.stdout
