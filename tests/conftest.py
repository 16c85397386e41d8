"""How the suite is shared between pytest-xdist processes (`make test`: ``-n 2 --dist loadfile``).

Each test file is one unit of work, as with xdist's own ``loadfile`` (a file's module fixtures
run once), except that every file using the session fixture ``demo_run`` (a whole
`penumbra demo`, the suite's most expensive setup) is one unit together: a session fixture is
made once per process, and the files spread over two processes ran the demo twice.

Why a scheduler and not ``--dist loadgroup`` with ``xdist_group`` marks: with pytest 9.2,
xdist 3.8's loadgroup no longer groups anything (it renames node ids through a field pytest no
longer reads; pytest-xdist issue 1386), silently.
"""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path

import pytest

#: Session fixtures whose users must share one process; the unit is named after the fixture.
SHARED_SESSION_FIXTURES = ("demo_run",)


@lru_cache(maxsize=None)
def _unit_of_file(root: str, path: str) -> str:
    try:
        text = (Path(root) / path).read_text(encoding="utf-8")
    except OSError:
        return path
    return next((name for name in SHARED_SESSION_FIXTURES if name in text), path)


class _FileUnitScheduling:
    """The xdist hook, registered only when xdist is loaded (``-p no:xdist`` knows no such hook)."""

    @pytest.hookimpl(tryfirst=True)
    def pytest_xdist_make_scheduler(self, config, log):
        if config.getoption("dist") != "loadfile":
            return None
        from xdist.scheduler import LoadScopeScheduling

        root = str(config.rootpath)

        class FilesSharingSessionFixtures(LoadScopeScheduling):
            """Units: a file, or all files naming one of SHARED_SESSION_FIXTURES."""

            def _split_scope(self, nodeid: str) -> str:
                return _unit_of_file(root, nodeid.split("::", 1)[0])

        return FilesSharingSessionFixtures(config, log)


def pytest_configure(config):
    if config.pluginmanager.hasplugin("xdist"):
        config.pluginmanager.register(_FileUnitScheduling(), "penumbra-file-units")
