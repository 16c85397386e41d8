"""Reading the server's machine-readable reason from a failed call, with protobuf alone.

The server attaches the standard gRPC rich error model to every refusal: trailing metadata
``grpc-status-details-bin`` holding a serialized ``google.rpc.Status`` whose ``details`` carry a
``google.rpc.ErrorInfo`` (reason, domain "penumbra", metadata {"field": ...}). The usual reader
(grpcio-status) needs googleapis-common-protos; the shim must stay on grpcio, protobuf and
numpy, so the two messages are declared here with the same names and field numbers, in a
private descriptor pool built with protobuf's generic message API:

* no generated code to regenerate and keep fresh for two messages that never change;
* a private pool: a process that also loads googleapis-common-protos (the server, tests) has
  ``google.rpc.Status`` in the default pool, and declaring it there twice would clash.

``google.protobuf.Any`` is declared field for field too (type_url = 1, value = 2), so nothing but
the protobuf runtime is needed. Unknown or malformed details give empty strings, never an error.
"""

from __future__ import annotations

from google.protobuf import descriptor_pb2, descriptor_pool, message_factory

__all__ = ["STATUS_DETAILS_KEY", "ErrorDetails", "error_details"]

#: Trailing-metadata key of the serialized google.rpc.Status.
STATUS_DETAILS_KEY = "grpc-status-details-bin"
_ERROR_INFO_TYPE = "google.rpc.ErrorInfo"

_F = descriptor_pb2.FieldDescriptorProto


def _message_classes():
    file = descriptor_pb2.FileDescriptorProto(name="penumbra_shim/rich_status.proto", package="google.rpc",
                                              syntax="proto3")
    anything = file.message_type.add(name="Any")
    anything.field.add(name="type_url", number=1, type=_F.TYPE_STRING, label=_F.LABEL_OPTIONAL)
    anything.field.add(name="value", number=2, type=_F.TYPE_BYTES, label=_F.LABEL_OPTIONAL)
    status = file.message_type.add(name="Status")
    status.field.add(name="code", number=1, type=_F.TYPE_INT32, label=_F.LABEL_OPTIONAL)
    status.field.add(name="message", number=2, type=_F.TYPE_STRING, label=_F.LABEL_OPTIONAL)
    status.field.add(name="details", number=3, type=_F.TYPE_MESSAGE, label=_F.LABEL_REPEATED,
                     type_name=".google.rpc.Any")
    info = file.message_type.add(name="ErrorInfo")
    info.field.add(name="reason", number=1, type=_F.TYPE_STRING, label=_F.LABEL_OPTIONAL)
    info.field.add(name="domain", number=2, type=_F.TYPE_STRING, label=_F.LABEL_OPTIONAL)
    entry = info.nested_type.add(name="MetadataEntry")
    entry.field.add(name="key", number=1, type=_F.TYPE_STRING, label=_F.LABEL_OPTIONAL)
    entry.field.add(name="value", number=2, type=_F.TYPE_STRING, label=_F.LABEL_OPTIONAL)
    entry.options.map_entry = True
    info.field.add(name="metadata", number=3, type=_F.TYPE_MESSAGE, label=_F.LABEL_REPEATED,
                   type_name=".google.rpc.ErrorInfo.MetadataEntry")
    pool = descriptor_pool.DescriptorPool()
    pool.Add(file)
    return (message_factory.GetMessageClass(pool.FindMessageTypeByName("google.rpc.Status")),
            message_factory.GetMessageClass(pool.FindMessageTypeByName("google.rpc.ErrorInfo")))


_Status, _ErrorInfo = _message_classes()


class ErrorDetails:
    """The ErrorInfo of a refusal: ``reason`` (UPPER_SNAKE), ``domain``, ``field`` ("" if none)."""

    __slots__ = ("reason", "domain", "field")

    def __init__(self, reason: str = "", domain: str = "", field: str = "") -> None:
        self.reason, self.domain, self.field = reason, domain, field


def error_details(trailing_metadata) -> ErrorDetails:
    """The first google.rpc.ErrorInfo in a call's trailing metadata (empty when there is none)."""
    raw = None
    for key, value in trailing_metadata or ():
        if key == STATUS_DETAILS_KEY:
            raw = value
    if not isinstance(raw, bytes):
        return ErrorDetails()
    try:
        status = _Status.FromString(raw)
        for detail in status.details:
            if detail.type_url.rsplit("/", 1)[-1] == _ERROR_INFO_TYPE:
                info = _ErrorInfo.FromString(detail.value)
                return ErrorDetails(info.reason, info.domain, info.metadata.get("field", ""))
    except Exception:  # a malformed trailer must not hide the call's own error
        return ErrorDetails()
    return ErrorDetails()
