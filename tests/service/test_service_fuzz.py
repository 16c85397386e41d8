"""Fuzzing the wire with hypothesis: generated run specs, slice headers and chunks thrown at a real
server on loopback. Every refusal is a specific status code (never INTERNAL or UNKNOWN), and after
the fuzzing a control run still finds a lone Brill-Lindquist hole.

Deterministic (derandomize=True) and bounded (50 examples per test, 150 in all), so CI sees the same
cases. The tests run in file order: the last one counts the cases the others threw.
"""

from __future__ import annotations

import grpc
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import penumbra_shim as ps
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_shim._wire import horizons_pb2_grpc as pb_grpc

from service_support import lone_hole_slice, lone_spec, raw_requests

FORBIDDEN = (grpc.StatusCode.INTERNAL, grpc.StatusCode.UNKNOWN)
FUZZ = settings(max_examples=50, deadline=None, derandomize=True, database=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
CASES: list[str] = []

floats = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.sampled_from([0.0, -1.0, 1e-300, 1e300]))
int32 = st.integers(-(2**31), 2**31 - 1)
names = st.one_of(st.sampled_from(["gamma_xx", "gamma_xy", "K_xx", "alpha", "excision_mask", ""]),
                  st.text(max_size=8), st.just("x" * 5000))


@pytest.fixture(scope="module")
def wire(server):
    """(stub, the wire messages of a small lone-hole slice for the fuzz target run)."""
    channel = grpc.insecure_channel(server.address)
    stub = pb_grpc.HorizonServiceStub(channel)
    run_id = stub.OpenRun(pb.OpenRunRequest(spec=lone_spec("fuzz target").to_wire()), timeout=30).run.run_id
    base = raw_requests(lone_hole_slice(1, nodes=9), run_id, chunk_bytes=4096)
    yield stub, base
    channel.close()


def _call(fn, *args) -> None:
    """Run one call; a refusal must carry a specific code (an acceptance is fine too)."""
    try:
        fn(*args, timeout=30)
    except grpc.RpcError as exc:
        assert exc.code() not in FORBIDDEN, f"{exc.code().name}: {exc.details()}"
        CASES.append(exc.code().name)
        return
    CASES.append("OK")


@FUZZ
@given(lmax=int32, tolerance=floats, max_iterations=int32, queue_depth=int32, mass=floats,
       position=st.tuples(floats, floats, floats), label=names, body_count=st.integers(0, 3),
       part_deadline=floats, variable_set=int32)
def test_generated_run_specs_get_specific_codes(wire, lmax, tolerance, max_iterations, queue_depth, mass,
                                                position, label, body_count, part_deadline, variable_set):
    stub, _ = wire
    spec = lone_spec("fuzz spec").to_wire()
    spec.variable_set = variable_set % 8
    spec.finder.lmax, spec.finder.tolerance_per_m, spec.finder.max_iterations = lmax, tolerance, max_iterations
    spec.backlog.queue_depth = queue_depth
    spec.part_deadline_s = part_deadline
    del spec.bodies[:]
    for _ in range(body_count):
        body = spec.bodies.add(label=label, approximate_mass_m=mass)
        body.approximate_position_m.x, body.approximate_position_m.y, body.approximate_position_m.z = position
    _call(stub.OpenRun, pb.OpenRunRequest(spec=spec))


@FUZZ
@given(shape=st.lists(int32, max_size=4), spacing=st.tuples(floats, floats, floats),
       field_names=st.lists(names, max_size=6), dtype=int32, order=int32, part_index=int32, part_count=int32,
       total_bytes=st.one_of(st.integers(0, 2**63 - 1), st.none()), patches=st.integers(0, 3),
       iteration=st.integers(-(2**63), 2**63 - 1), time_m=floats, keep_names=st.booleans())
def test_generated_headers_get_specific_codes(wire, shape, spacing, field_names, dtype, order, part_index,
                                             part_count, total_bytes, patches, iteration, time_m, keep_names):
    stub, base = wire
    header = pb.SendSliceRequest()
    header.CopyFrom(base[0])
    h = header.header
    h.iteration, h.time_m = iteration, time_m
    template = pb.PatchHeader()
    template.CopyFrom(h.patches[0])
    del h.patches[:]
    for _ in range(patches):
        p = h.patches.add()
        p.CopyFrom(template)
        p.shape[:] = shape
        p.spacing_m.x, p.spacing_m.y, p.spacing_m.z = spacing
        if not keep_names:
            p.field_names[:] = field_names
        p.dtype, p.memory_order = dtype % 4, order % 4
    if total_bytes is not None:
        h.total_bytes = total_bytes
    h.part_index, h.part_count = part_index, part_count
    _call(stub.SendSlice, iter([header]))


@FUZZ
@given(edits=st.lists(st.tuples(st.integers(0, 200), st.integers(-(2**63), 2**63 - 1), int32, names,
                                st.binary(max_size=64)), max_size=3),
       cut=st.integers(0, 200), unknown=st.binary(max_size=16))
def test_generated_chunks_get_specific_codes(wire, edits, cut, unknown):
    stub, base = wire
    requests = []
    for r in base:
        c = pb.SendSliceRequest()
        c.CopyFrom(r)
        requests.append(c)
    requests[0].header.iteration = 10_000 + len(CASES)  # a fresh slice each time
    chunks = requests[1:]
    for index, offset, patch_index, field, data in edits:
        chunk = chunks[index % len(chunks)].chunk
        chunk.offset_bytes, chunk.patch_index, chunk.field_name = offset, patch_index, field
        chunk.data = data
    chunks = chunks[: max(1, cut)] if cut < len(chunks) else chunks
    if unknown:
        # A field number nobody uses, as unknown bytes on a chunk (tag 15, length-delimited).
        chunks[0].chunk.MergeFromString(bytes([0x7A, len(unknown)]) + unknown)
    _call(stub.SendSlice, iter([requests[0], *chunks]))


def test_after_the_fuzzing_a_control_run_finds_the_lone_hole(server):
    print(f"\nfuzz cases: {len(CASES)}; codes: "
          f"{ {code: CASES.count(code) for code in sorted(set(CASES))} }")
    assert len(CASES) >= 150
    with ps.connect(server.address, deadline_s=30.0) as client:
        run = client.open_run(lone_spec("after fuzzing"), cache_results=False)
        assert run.submit(lone_hole_slice(0)).result(60).accepted
        run.close()
        events = list(client.watch(run.run_id, from_seq=1, timeout_s=600))
    found = [e for e in events if e.kind == "surface_found"]
    assert len(found) == 1
    # Area 16 pi m^2 of a lone Brill-Lindquist hole (Brill & Lindquist, Phys. Rev. 131, 471 (1963):
    # the horizon of one puncture is the sphere r = m/2); grid accuracy of the lone-hole slice.
    assert found[0].surface.area / (16 * np.pi) == pytest.approx(1.0, abs=2e-3)
