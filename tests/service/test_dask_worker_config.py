"""The Dask configuration the deployment files give workers (deploy/dask-workers.yaml, the same
text written by deploy/penumbra-dask.sbatch): read by a real Dask in a fresh process, the nanny
starts workers without MALLOC_TRIM_THRESHOLD_ (Dask's default 65536 pins glibc's mmap threshold
and made the finder's jobs ~1.8 times slower; DEVELOPERS.md, "The Dask engine keeps up with the
process pool") and without the profiler.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

pytest.importorskip("distributed")
pytestmark = pytest.mark.slow  # each test starts a Python that imports distributed

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"

READ_CONFIG = """
import json
import dask, distributed
from distributed.nanny import _get_env_variables
print(json.dumps({"environ": _get_env_variables("distributed.nanny.pre-spawn-environ"),
                  "profile": dask.config.get("distributed.worker.profile.enabled")}))
"""


def _worker_settings(config_dir: Path | None) -> dict:
    env = {k: v for k, v in os.environ.items() if not k.startswith("DASK_") and k != "MALLOC_TRIM_THRESHOLD_"}
    if config_dir is not None:
        env["DASK_CONFIG"] = str(config_dir)
    done = subprocess.run([sys.executable, "-c", READ_CONFIG], env=env, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout.strip().splitlines()[-1])


def test_the_deployed_worker_config_unsets_the_malloc_trim_threshold(tmp_path):
    # Without it, Dask's defaults set the variable (what the file is there to undo).
    assert _worker_settings(None)["environ"].get("MALLOC_TRIM_THRESHOLD_") == "65536"
    (tmp_path / "penumbra-workers.yaml").write_text((DEPLOY / "dask-workers.yaml").read_text())
    settings = _worker_settings(tmp_path)
    assert "MALLOC_TRIM_THRESHOLD_" not in settings["environ"]
    assert settings["environ"].get("OMP_NUM_THREADS") == "1"  # the rest of Dask's defaults stay
    assert settings["profile"] is False


def test_the_batch_script_writes_the_same_worker_config():
    script = (DEPLOY / "penumbra-dask.sbatch").read_text()
    written = re.search(r"<<'YAML'\n(.*?)\nYAML\n", script, re.S)
    assert written, "penumbra-dask.sbatch no longer writes the workers' Dask config"
    assert written.group(1).strip() == (DEPLOY / "dask-workers.yaml").read_text().strip()
    assert "COPY deploy/dask-workers.yaml /etc/dask/" in (DEPLOY / "Containerfile").read_text()
