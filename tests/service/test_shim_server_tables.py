"""Tables kept once in the shim and once in the server (the shim must not import the server):
the two copies must agree value for value, and name every value the proto defines."""

from penumbra_shim import _events, _guidance_types, _link, _results
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_server.archive import _layout as layout
from penumbra_server.server import _tracking_convert, run_events


def test_drop_reasons_agree_with_the_archive_and_the_proto():
    server = {name: code for name, code in layout.CLIENT_DROP_REASONS.items() if code}
    assert _link._REASON_WIRE == server
    named = {v.number for v in pb.DESCRIPTOR.enum_types_by_name["ClientDropReason"].values if v.number}
    assert set(server.values()) == named
    assert set(_link.DROP_REASONS) == set(server)


def test_forecast_models_agree():
    assert {code: name for name, code in _tracking_convert._MODEL_WIRE.items()} == _guidance_types._MODEL_NAMES
    assert set(_tracking_convert._MODEL_WIRE) == {name for name, code in layout.FORECAST_MODELS.items() if code}


def test_track_sources_and_run_states_agree():
    assert set(_guidance_types._SOURCE_NAMES.values()) == set(layout.TRACK_SOURCES)
    wire_of = {"horizon": pb.TrackPoint.SOURCE_HORIZON, "puncture": pb.TrackPoint.SOURCE_PUNCTURE}
    assert {wire_of[name]: name for name in layout.TRACK_SOURCES} == _guidance_types._SOURCE_NAMES
    for code, name in run_events.STATE_NAMES.items():
        assert _results.STATE_NAMES[code] == name


def test_the_shim_names_every_event_kind_of_the_proto():
    kinds = [f.name for f in pb.RunEvent.DESCRIPTOR.oneofs_by_name["kind"].fields]
    assert set(_events.EVENT_KINDS) == set(kinds)
    for kind in kinds:  # and each has its own type, deriving from Event
        event = pb.RunEvent(seq=1)
        getattr(event, kind).SetInParent()
        converted = _events.event_from_wire(event)
        assert converted.kind == kind and type(converted) is not _events.Event
        assert isinstance(converted, _events.Event)
    assert isinstance(_events.event_from_wire(pb.RunEvent(seq=1)), _events.OtherEvent)
