"""Fixtures of the service tests: a real server on 127.0.0.1 (port 0) with real worker
processes and a real zarr archive on disk, shared by the tests of this directory."""

from __future__ import annotations

import grpc
import pytest

import penumbra_shim as ps
from penumbra_shim._wire import horizons_pb2_grpc as pb_grpc
from penumbra_server.server import BackgroundServer, ServerOptions


@pytest.fixture(scope="session")
def archive_root(tmp_path_factory):
    return tmp_path_factory.mktemp("archive")


@pytest.fixture(scope="session")
def server(archive_root):
    """One server for the directory: 2 worker processes, small chunk limit for the limit tests."""
    options = ServerOptions(workers=2, max_chunk_bytes=2 * 1024 * 1024)
    with BackgroundServer("127.0.0.1:0", archive_root=archive_root, workers=2, options=options) as bg:
        yield bg


@pytest.fixture()
def client(server):
    with ps.connect(server.address, deadline_s=20.0) as c:
        yield c


@pytest.fixture()
def stub(server):
    channel = grpc.insecure_channel(server.address)
    yield pb_grpc.HorizonServiceStub(channel)
    channel.close()
