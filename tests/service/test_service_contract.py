"""The shim on its own: three dependencies only, slice building in every layout, name tables
shared with the server, and the wire constants the server mirrors."""

from __future__ import annotations

import subprocess
import sys
import textwrap

import grpc
import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_server.numerics import slices as server_slices
from penumbra_server.server import jobs
from penumbra_server.server.ingest import IngestLimits, SliceAssembler

from service_support import lone_hole_slice


def test_shim_works_with_scipy_zarr_and_the_server_blocked(server):
    # Poisoned modules: any import of them inside the shim fails loudly.
    script = textwrap.dedent(
        f"""
        import sys
        for name in ("scipy", "zarr", "xarray", "numcodecs", "penumbra_server", "matplotlib",
                     "grpc_health", "grpc_reflection", "grpc_tools"):
            sys.modules[name] = None
        import numpy as np
        import penumbra_shim as ps
        spec = ps.RunSpec(variable_set="adm", bodies=[ps.Body("A", (0, 0, 0), 1.0)], name="isolated")
        fields = {{n: np.zeros((5, 5, 5)) for n in ps.required_fields("adm")}}
        for n in ("gamma_xx", "gamma_yy", "gamma_zz"):
            fields[n] = np.ones((5, 5, 5))
        sl = ps.build_slice(time=0.0, iteration=0, variable_set="adm",
                            patches=[ps.PatchData(origin=(-1, -1, -1), spacing=(0.5, 0.5, 0.5), fields=fields)])
        with ps.connect("{server.address}") as client:
            run = client.open_run(spec, cache_results=False)
            ack = run.submit(sl).result(30)
            assert ack.accepted, ack
            run.close()
        loaded = sorted(m for m in sys.modules if m.split(".")[0] in
                        ("scipy", "zarr", "xarray", "penumbra_server") and sys.modules[m] is not None)
        assert not loaded, loaded
        print("ok", ack.bytes_sent)
        """
    )
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr[-3000:]
    assert result.stdout.split() == ["ok", str(12 * 125 * 8)]


def test_field_tables_agree_with_the_server():
    for variable_set in ps.VARIABLE_SETS:
        assert ps.required_fields(variable_set) == server_slices.required_fields(variable_set)
        assert ps.optional_fields(variable_set) == server_slices.optional_fields(variable_set)
    assert set(ps.VARIABLE_SETS) == {v.value for v in server_slices.VariableSet}


def test_reason_constants_mirror_the_proto():
    r = pb.SurfaceNotFound
    assert (jobs.REASON_NOT_CONVERGED, jobs.REASON_NO_CANDIDATE, jobs.REASON_OUTSIDE_DATA, jobs.REASON_WORKER_FAILED) == (
        r.REASON_NOT_CONVERGED, r.REASON_NO_CANDIDATE, r.REASON_OUTSIDE_DATA, r.REASON_WORKER_FAILED)


def _assemble(outgoing: ps.OutgoingSlice):
    """What the server makes of the shim's wire messages."""
    requests = list(outgoing.requests("run-x", chunk_bytes=4096))
    assembler = SliceAssembler(requests[0].header, server_slices.VariableSet.parse(outgoing.variable_set),
                               IngestLimits())
    for r in requests[1:]:
        assembler.add(r.chunk)
    return assembler.finish()


def test_c_fortran_and_flat_layouts_arrive_as_the_same_slice():
    rng = np.random.default_rng(7)
    shape = (4, 5, 6)
    values = {n: rng.normal(size=shape) for n in ps.required_fields("conformal_phi")}
    base = dict(origin=(0.0, 1.0, 2.0), spacing=(0.1, 0.2, 0.3), level=2)
    variants = {
        "C arrays": ps.PatchData(fields=values, **base),
        "F arrays": ps.PatchData(fields={n: np.asfortranarray(a) for n, a in values.items()}, **base),
        "flat C": ps.PatchData(fields={n: a.ravel(order="C") for n, a in values.items()}, memory_order="C",
                               shape=shape, **base),
        "flat F": ps.PatchData(fields={n: a.ravel(order="F") for n, a in values.items()}, memory_order="F",
                               shape=shape, **base),
        "C arrays sent in F": ps.PatchData(fields=values, memory_order="F", **base),
    }
    orders = {}
    for label, patch in variants.items():
        outgoing = ps.build_slice(time=1.5, iteration=3, variable_set="conformal_phi", patches=patch)
        orders[label] = outgoing.patches[0].memory_order
        received = _assemble(outgoing).patches[0]
        assert received.shape == shape and received.level == 2
        for name, arr in values.items():
            np.testing.assert_array_equal(received.fields[name], arr, err_msg=f"{label}: {name}")
    assert orders == {"C arrays": "C", "F arrays": "F", "flat C": "C", "flat F": "F", "C arrays sent in F": "F"}


def test_float32_travels_as_float32_and_many_patches_keep_their_order():
    rng = np.random.default_rng(3)
    patches = [
        ps.PatchData(origin=(i, 0, 0), spacing=(0.5,) * 3, level=i,
                     fields={n: rng.normal(size=(3, 3, 3)).astype(np.float32) for n in ps.required_fields("adm")})
        for i in range(3)
    ]
    outgoing = ps.build_slice(time=0, iteration=0, variable_set="adm", patches=patches)
    assert outgoing.nbytes == 3 * 12 * 27 * 4 and all(p.dtype == "float32" for p in outgoing.patches)
    received = _assemble(outgoing)
    assert [p.level for p in received.patches] == [0, 1, 2]
    np.testing.assert_array_equal(received.patches[1].fields["K_xy"], patches[1].fields["K_xy"].astype(np.float64))


def test_build_slice_copies_so_the_caller_may_reuse_its_arrays():
    fields = {n: np.full((3, 3, 3), 2.0) for n in ps.required_fields("adm")}
    outgoing = ps.build_slice(time=0, iteration=0, variable_set="adm",
                              patches=ps.PatchData(origin=(0, 0, 0), spacing=(1, 1, 1), fields=fields))
    fields["gamma_xx"][:] = -1.0  # the evolution overwrites its array at once
    assert np.frombuffer(outgoing.patches[0].fields["gamma_xx"], dtype="<f8").tolist() == [2.0] * 27


@pytest.mark.parametrize(
    "change, message",
    [
        (dict(spacing=(1, 0, 1)), r"patches\[0\]\.spacing: every component must be > 0"),
        (dict(origin=(0, np.nan, 0)), r"patches\[0\]\.origin: expected finite numbers"),
        (dict(fields={"K_zz": np.zeros((3, 3, 4))}),
         r"fields\['K_zz'\]: array shape \(3, 3, 4\) does not match the patch shape \(3, 3, 3\) \(from patches\[0\]\.fields\['gamma_xx'\]\)"),
        (dict(fields={"gamma_xx": np.zeros((3, 3, 3), dtype=np.int64)}), r"fields\['gamma_xx'\]: expected float64 or float32"),
        (dict(fields={"gamma_xx": np.zeros(26)}), r"fields\['gamma_xx'\]: a flat buffer of 26 values"),
        (dict(fields={"gama_xx": np.zeros((3, 3, 3))}), r"unknown field 'gama_xx'"),
        (dict(fields={"K_xx": np.full((3, 3, 3), np.inf)}), r"fields\['K_xx'\]: non-finite value .* \[0, 0, 0\]"),
        (dict(memory_order="X"), r"memory_order: expected 'C', 'F' or None"),
    ],
)
def test_bad_patches_are_refused_naming_the_field(change, message):
    fields = {n: np.zeros((3, 3, 3)) for n in ps.required_fields("adm")}
    fields.update(change.pop("fields", {}))
    patch = dict(origin=(0, 0, 0), spacing=(1, 1, 1), fields=fields)
    patch.update(change)
    with pytest.raises(ps.SliceValidationError, match=message):
        ps.build_slice(time=0, iteration=0, variable_set="adm", patches=[ps.PatchData(**patch)])


def test_chunks_are_about_the_requested_size_and_cover_every_byte():
    outgoing = lone_hole_slice(0, nodes=17)
    requests = list(outgoing.requests("run-x", chunk_bytes=10_000))
    assert requests[0].WhichOneof("part") == "header" and requests[0].header.total_bytes == outgoing.nbytes
    chunks = [r.chunk for r in requests[1:]]
    assert max(len(c.data) for c in chunks) == 10_000
    assert sum(len(c.data) for c in chunks) == outgoing.nbytes


def test_health_and_reflection_are_served(server):
    from grpc_health.v1 import health_pb2, health_pb2_grpc
    from grpc_reflection.v1alpha import reflection_pb2, reflection_pb2_grpc

    with grpc.insecure_channel(server.address) as channel:
        health = health_pb2_grpc.HealthStub(channel)
        status = health.Check(health_pb2.HealthCheckRequest(service="penumbra.v1.HorizonService"), timeout=10)
        assert status.status == health_pb2.HealthCheckResponse.SERVING
        reflection = reflection_pb2_grpc.ServerReflectionStub(channel)
        replies = list(reflection.ServerReflectionInfo(iter([reflection_pb2.ServerReflectionRequest(list_services="")]),
                                                       timeout=10))
        names = {s.name for s in replies[0].list_services_response.service}
        assert "penumbra.v1.HorizonService" in names and "grpc.health.v1.Health" in names


def test_list_runs_pages_through_every_run(client):
    for i in range(3):
        client.open_run(ps.RunSpec(variable_set="adm", bodies=[ps.Body("A", (0, 0, 0), 1.0)], name=f"page {i}"),
                        cache_results=False)
    everything = client.list_runs(page_size=2)
    assert len(everything) == len({r.run_id for r in everything}) >= 3
    assert [r.created_unix_s for r in everything] == sorted((r.created_unix_s for r in everything), reverse=True)
    with pytest.raises(ps.PenumbraError) as info:
        client._call("ListRuns", pb.ListRunsRequest(page_token="garbage"))
    assert info.value.code == grpc.StatusCode.INVALID_ARGUMENT and "page_token" in info.value.details


def test_a_second_server_on_a_bound_port_is_refused(server, tmp_path):
    from penumbra_server.server import BackgroundServer

    with pytest.raises(OSError, match="could not listen"):
        BackgroundServer(server.address, archive_root=tmp_path, workers=1).start()


def test_workers_are_separate_processes_with_single_threaded_blas(server):
    import os

    executor = server.server.executor
    assert len(executor.worker_pids) == 2 and os.getpid() not in executor.worker_pids
    assert set(executor.worker_thread_settings.values()) == {"1"}
