"""Slices sent in parts through a real server: the part deadline, giving up, keeping one copy of
a patch two parts share, and every refusal with its status code, reason token and field name.
After the refusals, the parts stored before are still pending and a control iteration completes.

The many-process case (eight ranks) is in test_service_parts_ranks.py.
"""

from __future__ import annotations

import time

import grpc
import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_shim._errors import error_from_rpc
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_shim._wire import horizons_pb2_grpc as pb_grpc

import parts_support as support
from penumbra_server.server import BackgroundServer, ServerOptions
from service_support import LONE_CENTRE, box, lone_hole, lone_spec, patch_data

POLL_S = 120.0


def _events_until(client, run_id: str, done, timeout_s: float = POLL_S) -> list[ps.Event]:
    """Events of a run from the first until ``done(events)``; fails loudly after ``timeout_s``."""
    events = []
    for event in client.watch(run_id, from_seq=1, timeout_s=timeout_s):
        events.append(event)
        if done(events):
            return events
    pytest.fail(f"run {run_id}: the awaited events did not come within {timeout_s} s; saw "
                f"{[(e.kind, e.iteration) for e in events]}")


def _processed(*iterations):
    return lambda events: set(iterations) <= {e.iteration for e in events if e.kind == "slice_processed"}


def _lone_patch(mass: float = 1.0) -> ps.PatchData:
    return patch_data(lone_hole(mass), box(LONE_CENTRE, 1.2, 33))


def _part(iteration: int, patches, index: int, count: int, *, time_m: float | None = None) -> ps.OutgoingSlice:
    t = 0.1 * iteration if time_m is None else time_m
    return ps.build_slice(time=t, iteration=iteration, variable_set="adm", patches=patches, part_index=index,
                          part_count=count)


def _send(stub, outgoing: ps.OutgoingSlice, run_id: str) -> pb.SendSliceResponse:
    return stub.SendSlice(outgoing.requests(run_id), timeout=60)


def _refused(stub, requests) -> grpc.RpcError:
    with pytest.raises(grpc.RpcError) as info:
        stub.SendSlice(iter(requests), timeout=60)
    return info.value


def _assert_refusal(err: grpc.RpcError, code: grpc.StatusCode, token: str, *fragments: str) -> None:
    assert err.code() == code, err.details()
    assert error_from_rpc(err).reason == token.upper(), err.details()
    for fragment in fragments:
        assert fragment in err.details(), err.details()


# -- the shim ---------------------------------------------------------------------------------------


def test_build_slice_checks_the_part_index_and_count():
    patch = _lone_patch()
    with pytest.raises(ps.SliceValidationError, match=r"part_index: expected 0 \.\. 3"):
        _part(0, [patch], 4, 4)
    with pytest.raises(ps.SliceValidationError, match="part_index"):
        _part(0, [patch], -1, 4)
    with pytest.raises(ps.SliceValidationError, match="part_count: expected 1"):
        _part(0, [patch], 0, 0)
    with pytest.raises(ps.SliceValidationError, match="part_count: expected an integer"):
        _part(0, [patch], 0, 2.0)
    with pytest.raises(ps.SliceValidationError, match="a whole slice needs at least one patch"):
        _part(0, [], 0, 1)
    empty = _part(0, [], 3, 4)
    assert empty.patches == () and empty.nbytes == 0 and empty.is_part
    header = empty.header("run-x")
    assert (header.part_index, header.part_count, len(header.patches)) == (3, 4, 0)


def test_a_part_cropped_to_nothing_is_an_empty_part_and_a_whole_slice_is_none():
    far = np.array([[[50.0, 50.0, 50.0], [51.0, 51.0, 51.0]]])
    whole = _part(0, [_lone_patch()], 0, 1)
    assert ps.crop_outgoing_slice(whole, far) is None  # the sender then sends it whole
    part = ps.crop_outgoing_slice(_part(0, [_lone_patch()], 2, 3), far)
    assert part is not None and part.patches == () and (part.part_index, part.part_count) == (2, 3)
    near = np.array([[np.subtract(LONE_CENTRE, 0.2), np.add(LONE_CENTRE, 0.2)]])
    kept = ps.crop_outgoing_slice(_part(0, [_lone_patch()], 2, 3), near, extra_nodes=2)
    assert len(kept.patches) == 1 and kept.patches[0].shape < (33, 33, 33) and kept.part_index == 2


# -- the spec ---------------------------------------------------------------------------------------


@pytest.mark.parametrize("value", [-1.0, float("nan"), float("inf")])
def test_a_part_deadline_that_is_not_a_positive_number_is_invalid(stub, value):
    spec = lone_spec().to_wire()
    spec.part_deadline_s = value
    with pytest.raises(grpc.RpcError) as info:
        stub.OpenRun(pb.OpenRunRequest(spec=spec), timeout=30)
    assert info.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "spec.part_deadline_s" in info.value.details()


def test_the_part_deadline_defaults_to_sixty_seconds(client):
    run = client.open_run(lone_spec("default part deadline"), cache_results=False)
    assert run.info.spec.part_deadline_s == 60.0
    run.close()


# -- deadline, closing and giving up --------------------------------------------------------------------


def test_seven_of_eight_parts_are_processed_after_the_deadline_and_the_missing_part_is_named(client):
    """Part 0 carries body A's boxes, part 7 (never sent) body B's, parts 1-6 are empty."""
    (m1, m2), (p1, p2) = support.MASSES, support.POSITIONS
    spec = ps.RunSpec(variable_set=support.VARIABLE_SET, name="seven of eight", part_deadline_s=3.0,
                      bodies=(ps.Body("A", tuple(np.add(p1, 0.05)), m1), ps.Body("B", tuple(np.subtract(p2, 0.04)), m2)),
                      finder=ps.FinderOptions(lmax=6))
    run = client.open_run(spec, cache_results=False, queue_depth=8)
    a_side = support.rank_patches(4) + support.rank_patches(5)  # the coarse slabs and fine box about A
    tickets = [run.submit_arrays(time=0.0, iteration=0, patches=a_side if index == 0 else [], part_index=index,
                                 part_count=support.RANKS) for index in range(7)]
    late = set()
    for index, ticket in enumerate(tickets):
        error = ticket.exception(POLL_S)
        if error is None:
            ack = ticket.result()
            assert ack.accepted and ack.waiting_for_parts and ack.parts_expected == support.RANKS
        else:
            # Only a part that came after the deadline may be refused, and then as too late (no
            # timing is assumed: on a loaded machine the deadline may pass between two sends).
            assert index > 0 and error.code == grpc.StatusCode.FAILED_PRECONDITION, error
            assert error.reason == "PART_AFTER_ASSEMBLY", error.details
            late.add(index)
    events = _events_until(client, run.run_id, _processed(0))
    kinds = [e.kind for e in events]
    missing = [e for e in events if e.kind == "slice_parts_missing"]
    assert len(missing) == 1
    report = missing[0]
    assert report.iteration == 0 and report.parts_expected == support.RANKS
    assert report.missing_parts == tuple(sorted({7} | late))
    assert report.disposition == "processed" and "7" in report.message and "part_deadline_s = 3 s" in report.message
    assert report.raw.slice_parts_missing.patches_received == len(a_side)
    # Announced before any result of the slice; then each surface as its data allow.
    assert kinds.index("slice_parts_missing") < kinds.index("surface_found")
    outcomes = {e.surface.label: e.surface for e in events
                if isinstance(e, (ps.SurfaceFoundEvent, ps.SurfaceNotFoundEvent)) and e.iteration == 0}
    assert outcomes["A"].found
    assert not outcomes["B"].found  # B's boxes were in the missing part
    (m, other), d = (m1, m2), float(np.linalg.norm(np.subtract(p1, p2)))
    # Brill & Lindquist, Phys. Rev. 131, 471 (1963), leading order in m/d (docs/references.md item 7).
    assert outcomes["A"].irreducible_mass == pytest.approx(m * (1 + other / (2 * d)), rel=5e-3)
    info = run.describe()
    assert info.slices_incomplete == 1 and info.slices_received == 1
    run.close()


def test_closing_hands_on_a_pending_slice_keeping_one_copy_of_a_shared_patch(client, stub):
    """Two parts carry the same patch with the same data (two ranks holding one box): one copy is
    kept. Closing the run hands the slice on with the third part missing."""
    run = client.open_run(lone_spec("shared patch"), cache_results=False)
    patch = _lone_patch()
    first = _send(stub, _part(3, [patch], 0, 3), run.run_id)
    second = _send(stub, _part(3, [patch], 1, 3), run.run_id)
    assert first.outcome == second.outcome == pb.SendSliceResponse.OUTCOME_PART_ACCEPTED
    assert (second.parts_received, second.parts_expected) == (2, 3)
    info = run.close()
    assert info.slices_incomplete == 1 and info.slices_received == 1 and info.slices_processed == 1
    events = list(client.watch(run.run_id, from_seq=1, timeout_s=POLL_S))
    report = [e for e in events if e.kind == "slice_parts_missing"]
    assert len(report) == 1 and report[0].missing_parts == (2,) and report[0].disposition == "processed"
    assert "closed" in report[0].message
    assert report[0].raw.slice_parts_missing.patches_received == 1
    found = [e.surface for e in events if e.kind == "surface_found"]
    assert len(found) == 1 and found[0].iteration == 3
    # A lone puncture's horizon: area 16 pi m^2 (docs/references.md item 1; any GR text).
    assert found[0].area == pytest.approx(16 * np.pi, rel=1e-3)


def test_a_slice_whose_parts_carried_no_patch_is_given_up_and_a_late_part_is_refused(client, stub):
    run = client.open_run(ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", LONE_CENTRE, 1.0),),
                                     name="given up", part_deadline_s=0.5), cache_results=False)
    response = _send(stub, _part(4, [], 0, 2), run.run_id)
    assert response.outcome == pb.SendSliceResponse.OUTCOME_PART_ACCEPTED and response.received_bytes == 0
    events = _events_until(client, run.run_id, lambda ev: any(e.kind == "slice_parts_missing" for e in ev))
    report = events[-1]
    assert report.iteration == 4 and report.missing_parts == (1,) and report.disposition == "given_up"
    assert "given up" in report.message
    err = _refused(stub, list(_part(4, [_lone_patch()], 1, 2).requests(run.run_id)))
    _assert_refusal(err, grpc.StatusCode.FAILED_PRECONDITION, "part_after_give_up", "header.iteration",
                    "iteration 4", "given up")
    info = run.describe()
    assert info.slices_received == 0 and info.slices_incomplete == 0  # nothing was processed
    # The run still takes slices.
    assert _send(stub, _part(5, [_lone_patch()], 0, 1), run.run_id).outcome == pb.SendSliceResponse.OUTCOME_ACCEPTED
    _events_until(client, run.run_id, _processed(5))
    run.close()


# -- refusals ---------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def refusal_run(server):
    with ps.connect(server.address, deadline_s=20.0) as client:
        run = client.open_run(lone_spec("parts refusals"), cache_results=False)
        yield client, run


def _tampered(run_id: str, **header_fields) -> list[pb.SendSliceRequest]:
    requests = list(_part(20, [_lone_patch()], 0, 2).requests(run_id, chunk_bytes=1 << 20))
    for name, value in header_fields.items():
        setattr(requests[0].header, name, value)
    return requests


@pytest.mark.parametrize("fields, token, field_name", [
    ({"part_index": -1}, "part_index_out_of_range", "header.part_index: expected 0 .. 1"),
    ({"part_index": 2}, "part_index_out_of_range", "header.part_index: expected 0 .. 1"),
    ({"part_index": 1, "part_count": 0}, "part_index_out_of_range", "header.part_index: expected 0 .. 0"),
    ({"part_count": -1}, "part_count_negative", "header.part_count"),
])
def test_a_bad_part_index_or_count_is_invalid(stub, refusal_run, fields, token, field_name):
    _, run = refusal_run
    err = _refused(stub, _tampered(run.run_id, **fields))
    _assert_refusal(err, grpc.StatusCode.INVALID_ARGUMENT, token, field_name)


@pytest.mark.parametrize("part_count", [0, 1])
def test_a_whole_slice_without_patches_is_invalid(stub, refusal_run, part_count):
    _, run = refusal_run
    header = pb.SliceHeader(run_id=run.run_id, time_m=0.0, iteration=21, variable_set=pb.VARIABLE_SET_ADM,
                            part_count=part_count)
    err = _refused(stub, [pb.SendSliceRequest(header=header)])
    _assert_refusal(err, grpc.StatusCode.INVALID_ARGUMENT, "whole_slice_without_patches", "header.patches")


def test_refused_parts_leave_the_stored_ones_pending_and_the_slice_completes(stub, refusal_run):
    client, run = refusal_run
    run_id = run.run_id
    patch, other_data = _lone_patch(), _lone_patch(mass=1.05)  # same box, different data
    first = _send(stub, _part(10, [patch], 0, 2, time_m=1.0), run_id)
    assert first.outcome == pb.SendSliceResponse.OUTCOME_PART_ACCEPTED
    assert (first.parts_received, first.parts_expected, first.queue_position) == (1, 2, -1)
    again = _send(stub, _part(10, [patch], 0, 2, time_m=1.0), run_id)
    assert again.outcome == pb.SendSliceResponse.OUTCOME_DUPLICATE and again.parts_received == 1

    err = _refused(stub, list(_part(10, [patch], 1, 2, time_m=1.5).requests(run_id)))
    _assert_refusal(err, grpc.StatusCode.FAILED_PRECONDITION, "part_time_mismatch", "header.time_m", "1.0", "1.5")
    err = _refused(stub, list(_part(10, [patch], 1, 3, time_m=1.0).requests(run_id)))
    _assert_refusal(err, grpc.StatusCode.FAILED_PRECONDITION, "part_count_mismatch", "header.part_count",
                    "expected 2", "got 3")
    err = _refused(stub, list(_part(10, [patch], 0, 1, time_m=1.0).requests(run_id)))
    _assert_refusal(err, grpc.StatusCode.FAILED_PRECONDITION, "part_count_mismatch", "header.part_count",
                    "whole slice")
    err = _refused(stub, list(_part(10, [other_data], 1, 2, time_m=1.0).requests(run_id)))
    _assert_refusal(err, grpc.StatusCode.ALREADY_EXISTS, "patch_conflict", "header.patches", "part 0",
                    "different data", "shape [33, 33, 33]")

    # Nothing was lost: the second part completes the slice.
    last = _send(stub, _part(10, [patch], 1, 2, time_m=1.0), run_id)
    assert last.outcome == pb.SendSliceResponse.OUTCOME_ACCEPTED and (last.parts_received, last.parts_expected) == (2, 2)
    # A copy of a part of the complete slice (a resend whose answer was lost) is a duplicate.
    copy = _send(stub, _part(10, [patch], 0, 2, time_m=1.0), run_id)
    assert copy.outcome == pb.SendSliceResponse.OUTCOME_DUPLICATE and copy.parts_received == 2
    # A re-sent whole slice of an assembled iteration is a duplicate, as for any slice.
    assert _send(stub, _part(10, [patch], 0, 1, time_m=1.0), run_id).outcome == pb.SendSliceResponse.OUTCOME_DUPLICATE

    # An iteration accepted whole takes no parts.
    assert _send(stub, _part(11, [patch], 0, 1), run_id).outcome == pb.SendSliceResponse.OUTCOME_ACCEPTED
    err = _refused(stub, list(_part(11, [patch], 1, 2).requests(run_id)))
    _assert_refusal(err, grpc.StatusCode.FAILED_PRECONDITION, "part_after_assembly", "iteration 11")

    events = _events_until(client, run_id, _processed(10, 11))
    found = {e.iteration: e.surface for e in events if e.kind == "surface_found"}
    assert set(found) == {10, 11}
    assert found[10].area == pytest.approx(16 * np.pi, rel=1e-3)  # docs/references.md item 1
    # The same data, once in parts, once whole: the same surface to round-off (slice 11 starts from
    # slice 10's surface moved to the forecast, so its solve may stop an iteration earlier).
    assert found[10].area == pytest.approx(found[11].area, rel=1e-12)
    info = client.get_run(run_id)
    assert (info.slices_received, info.slices_incomplete) == (2, 0)
    assert not [e for e in events if e.kind == "slice_parts_missing"]


# -- restart ----------------------------------------------------------------------------------------


@pytest.mark.slow
def test_a_restarted_server_remembers_incomplete_and_given_up_slices(tmp_path):
    """Parts-missing events are archived: after a restart the counter, the events and the refusal
    of late parts come back (pending parts come back from their part files: test_service_parts_crash.py)."""
    options = ServerOptions(workers=1)
    first = BackgroundServer("127.0.0.1:0", archive_root=tmp_path, workers=1, options=options).start()
    address = first.address
    try:
        with ps.connect(address, deadline_s=20.0) as client:
            spec = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", LONE_CENTRE, 1.0),), name="restart parts",
                              part_deadline_s=0.5)
            run_id = client.open_run(spec, cache_results=False).run_id
            channel = grpc.insecure_channel(address)
            stub = pb_grpc.HorizonServiceStub(channel)
            _send(stub, _part(0, [], 0, 2), run_id)
            _events_until(client, run_id, lambda ev: any(e.kind == "slice_parts_missing" for e in ev))
            _send(stub, _part(1, [_lone_patch()], 0, 2), run_id)
            before = _events_until(client, run_id, _processed(1))
            channel.close()
    finally:
        first.stop()
    second = BackgroundServer(address, archive_root=tmp_path, workers=1, options=options).start()
    try:
        with ps.connect(address, deadline_s=20.0) as client:
            info = client.get_run(run_id)
            assert (info.slices_received, info.slices_incomplete) == (1, 1)
            reports = [e for e in client.watch(run_id, from_seq=1, timeout_s=5) if e.kind == "slice_parts_missing"]
            assert [(e.iteration, e.disposition, e.missing_parts) for e in reports] == [(0, "given_up", (1,)),
                                                                                (1, "processed", (1,))]
            assert [e.seq for e in reports] == [e.seq for e in before if e.kind == "slice_parts_missing"]
            channel = grpc.insecure_channel(address)
            stub = pb_grpc.HorizonServiceStub(channel)
            err = _refused(stub, list(_part(0, [_lone_patch()], 1, 2).requests(run_id)))
            _assert_refusal(err, grpc.StatusCode.FAILED_PRECONDITION, "part_after_give_up", "iteration 0")
            err = _refused(stub, list(_part(1, [_lone_patch()], 1, 2).requests(run_id)))
            _assert_refusal(err, grpc.StatusCode.FAILED_PRECONDITION, "part_after_assembly", "iteration 1")
            channel.close()
    finally:
        second.stop()


# -- reflection -------------------------------------------------------------------------------------


def test_parts_of_a_half_grid_are_mirrored_through_z0_each(client, stub):
    """With bitant symmetry each part is mirrored on arrival: two slabs of the z >= 0 half of a lone
    hole give its full horizon; a part reaching below z = 0 is refused naming the run's setting."""
    from penumbra_server.numerics.spacetimes import BrillLindquist

    centre = (0.013, -0.021, 0.0)
    hole = BrillLindquist(masses=(1.0,), positions=(centre,))
    h = 2.4 / 32
    slabs = [{"origin": (centre[0] - 1.2 + first * h, centre[1] - 1.2, 0.0), "spacing": (h, h, h),
              "shape": (last - first + 1, 33, 17)} for first, last in ((0, 20), (12, 32))]
    run = client.open_run(ps.RunSpec(variable_set="conformal_chi", bodies=(ps.Body("A", centre, 1.0),),
                                     name="half grid in parts", symmetry="bitant"), cache_results=False)
    below = dict(slabs[1], origin=(slabs[1]["origin"][0], slabs[1]["origin"][1], -0.3))
    err = _refused(stub, list(ps.build_slice(time=0.0, iteration=0, variable_set="conformal_chi", part_index=1,
                                             part_count=2, patches=[patch_data(hole, below, variable_set="conformal_chi")])
                              .requests(run.run_id)))
    assert err.code() == grpc.StatusCode.INVALID_ARGUMENT and "SYMMETRY_BITANT" in err.details()
    for index, slab in enumerate(slabs):
        outgoing = ps.build_slice(time=0.0, iteration=0, variable_set="conformal_chi", part_index=index, part_count=2,
                                  patches=[patch_data(hole, slab, variable_set="conformal_chi")])
        assert _send(stub, outgoing, run.run_id).parts_received == index + 1
    events = _events_until(client, run.run_id, _processed(0))
    found = [e.surface for e in events if e.kind == "surface_found"]
    assert len(found) == 1
    # Area 16 pi m^2 (docs/references.md item 1); the centroid on the plane by symmetry.
    assert found[0].area == pytest.approx(16 * np.pi, rel=1e-3)
    assert abs(found[0].centroid[2]) < 1e-6
    run.close()
