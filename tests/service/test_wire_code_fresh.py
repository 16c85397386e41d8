"""The committed wire code is exactly what the pinned generator makes from the proto."""

from __future__ import annotations

import difflib
import pytest

pytest.importorskip("grpc_tools", reason="grpcio-tools (dev extra) regenerates the wire code")

from penumbra_server.tools.regenerate_wire import generate, repository_root


def test_committed_wire_code_matches_a_fresh_generation(tmp_path):
    committed_dir = repository_root() / "client" / "penumbra_shim" / "_wire"
    fresh = generate(tmp_path)
    assert [p.name for p in fresh] == ["horizons_pb2.py", "horizons_pb2.pyi", "horizons_pb2_grpc.py"]
    stale = []
    for path in fresh:
        committed = committed_dir / path.name
        old = committed.read_text().splitlines(keepends=True) if committed.exists() else []
        new = path.read_text().splitlines(keepends=True)
        if old != new:
            diff = "".join(difflib.unified_diff(old, new, str(committed), "fresh", n=1))
            stale.append(diff[:2000])
    assert not stale, "wire code is stale; run `make wire`:\n" + "\n".join(stale)


def test_generated_code_imports_package_relative():
    text = (repository_root() / "client" / "penumbra_shim" / "_wire" / "horizons_pb2_grpc.py").read_text()
    assert "from . import horizons_pb2" in text
    assert "from penumbra.v1" not in text
