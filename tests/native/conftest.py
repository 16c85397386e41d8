"""One build of the native library, examples and probes for every test module here."""

import pytest

from native_support import build_all


@pytest.fixture(scope="session")
def build(tmp_path_factory):
    return build_all(tmp_path_factory.mktemp("native-build"))
