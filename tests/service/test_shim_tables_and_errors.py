"""The shim's error hierarchy and its variable-set table, against a real server on 127.0.0.1.

Every error of the shim is a ``PenumbraError`` and also the built-in error it resembles; the
status code of a failed call picks the class. The variable-set table between names and wire
values exists once in the shim and once in the server; the two must agree.
"""

import grpc
import pytest

import penumbra_shim as ps
from penumbra_shim import _fields as shim_fields
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_server.numerics.slices import VariableSet
from penumbra_server.server import _spec as server_spec
from penumbra_server.server.errors import ServiceError


def test_every_error_class_of_the_shim_is_a_penumbra_error():
    import penumbra_shim.cropping as cropping

    exported = [getattr(ps, name) for name in ps.__all__]
    errors = [obj for obj in exported if isinstance(obj, type) and issubclass(obj, BaseException)]
    assert {e.__name__ for e in errors} >= {"PenumbraError", "SliceValidationError", "CropError", "ServerError",
                                           "InvalidArgumentError", "RunNotFoundError", "UnknownWireValueError"}
    for error in errors + [cropping.CropError]:
        assert issubclass(error, ps.PenumbraError), error
    # Each also is the built-in error it resembles, so `except ValueError` keeps working.
    for error in (ps.SliceValidationError, ps.CropError, ps.InvalidArgumentError, ps.UnknownWireValueError):
        assert issubclass(error, ValueError), error
    assert issubclass(ps.RunNotFoundError, LookupError) and issubclass(ps.ServerError, RuntimeError)
    assert cropping.CropError is ps.CropError


def test_bad_input_found_before_sending_is_a_penumbra_error_without_a_status_code():
    with pytest.raises(ps.PenumbraError) as info:
        ps.build_slice(time=0.0, iteration=0, variable_set="bssn", patches=[])
    assert isinstance(info.value, ps.SliceValidationError) and isinstance(info.value, ValueError)
    assert info.value.code is None and "variable_set" in str(info.value)
    from penumbra_shim.cropping import crop_patches

    with pytest.raises(ps.PenumbraError, match="extra_nodes"):
        crop_patches([], [((0, 0, 0), (1, 1, 1))], extra_nodes=-1)


def test_invalid_argument_from_the_server_is_a_value_error(client):
    with pytest.raises(ValueError) as info:
        client._call("ListRuns", pb.ListRunsRequest(page_token="garbage"))
    error = info.value
    assert type(error) is ps.InvalidArgumentError
    assert isinstance(error, ps.ServerError) and isinstance(error, ps.PenumbraError)
    assert error.code == grpc.StatusCode.INVALID_ARGUMENT and error.method == "ListRuns"
    assert "page_token" in error.details and "INVALID_ARGUMENT" in str(error)


def test_an_unknown_run_is_a_lookup_error_and_other_codes_a_plain_server_error(client, server):
    with pytest.raises(LookupError) as info:
        client.get_run("run-000000000000")
    assert type(info.value) is ps.RunNotFoundError and info.value.code == grpc.StatusCode.NOT_FOUND
    # A call the server has not implemented: UNIMPLEMENTED has no class of its own.
    channel = grpc.insecure_channel(server.address)
    try:
        missing = channel.unary_unary("/penumbra.v1.HorizonService/NoSuchMethod",
                                      request_serializer=lambda b: b, response_deserializer=lambda b: b)
        with pytest.raises(grpc.RpcError) as raw:
            missing(b"", timeout=20)
    finally:
        channel.close()
    error = ps._errors.error_from_rpc(raw.value, "NoSuchMethod")
    assert type(error) is ps.ServerError and error.code == grpc.StatusCode.UNIMPLEMENTED
    assert not isinstance(error, ValueError) and not isinstance(error, LookupError)


# -- the variable-set table ------------------------------------------------------------------------


def test_client_and_server_variable_set_tables_agree():
    wire_values = {v for v in pb.VariableSet.values() if v != pb.VARIABLE_SET_UNSPECIFIED}
    # Both tables cover every wire value the proto defines, and every variable set of the numerics.
    assert set(shim_fields.VARIABLE_SET_WIRE.values()) == wire_values
    assert set(shim_fields.VARIABLE_SET_WIRE) == {v.value for v in VariableSet}
    for name, wire in shim_fields.VARIABLE_SET_WIRE.items():
        assert server_spec.variable_set_from_wire(wire, "variable_set") is VariableSet(name)
        assert server_spec.variable_set_to_wire(VariableSet(name)) == wire
        assert shim_fields.variable_set_from_wire(wire) == name
    assert ps.VARIABLE_SETS == tuple(shim_fields.VARIABLE_SET_WIRE)
    # The slice builder and the run spec use the same table.
    from penumbra_shim import _slices

    assert _slices.VARIABLE_SET_WIRE is shim_fields.VARIABLE_SET_WIRE


def test_an_unknown_wire_variable_set_is_an_error_on_both_sides():
    spec = ps.RunSpec(variable_set="conformal_w", bodies=[ps.Body("A", (0, 0, 0), 1.0)]).to_wire()
    assert ps.RunSpec.from_wire(spec).variable_set == "conformal_w"
    spec.variable_set = 97  # a value a newer server might send
    with pytest.raises(ps.UnknownWireValueError, match=r"spec\.variable_set: .* 97,.*adm \(1\)"):
        ps.RunSpec.from_wire(spec)
    with pytest.raises(ServiceError, match="variable_set: unknown variable set 97"):
        server_spec.variable_set_from_wire(97, "variable_set")
