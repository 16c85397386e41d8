"""The server's errors: one root class, and the refusal every request error becomes.

:class:`ServiceError` is a refused request: a gRPC status code, a message that names the field at
fault and what was expected, and a machine-readable ``reason`` (UPPER_SNAKE) and ``field``.
Servicers turn it into an aborted call whose trailing metadata carries the standard gRPC rich
error model: a ``google.rpc.Status`` in ``grpc-status-details-bin`` holding one
``google.rpc.ErrorInfo`` (reason, domain :data:`ERROR_DOMAIN`, metadata {"field": field})
(:func:`status_trailer`). Every other error class of the server derives from
:class:`PenumbraServerError` too.
"""

from __future__ import annotations

import re

import grpc

__all__ = ["PenumbraServerError", "ServiceError", "ERROR_DOMAIN", "DEFAULT_REASONS", "field_of", "status_trailer"]

#: ErrorInfo.domain of every refusal of this server.
ERROR_DOMAIN = "penumbra"
#: Reason of a refusal that names none, by status code.
DEFAULT_REASONS: dict[grpc.StatusCode, str] = {
    grpc.StatusCode.INVALID_ARGUMENT: "INVALID_FIELD",
    grpc.StatusCode.NOT_FOUND: "RUN_NOT_FOUND",
    grpc.StatusCode.FAILED_PRECONDITION: "FAILED_PRECONDITION",
    grpc.StatusCode.OUT_OF_RANGE: "OUT_OF_RANGE",
    grpc.StatusCode.RESOURCE_EXHAUSTED: "RESOURCE_EXHAUSTED",
    grpc.StatusCode.ALREADY_EXISTS: "ALREADY_EXISTS",
    grpc.StatusCode.DATA_LOSS: "DATA_LOSS",
    grpc.StatusCode.UNAVAILABLE: "UNAVAILABLE",
    grpc.StatusCode.UNAUTHENTICATED: "TOKEN_MISSING",
    grpc.StatusCode.PERMISSION_DENIED: "TOKEN_NOT_ALLOWED",
    grpc.StatusCode.INTERNAL: "INTERNAL",
}
# A message that starts with a field path ("header.patches[0].shape: ...") names that field.
_FIELD_PREFIX = re.compile(r"^([A-Za-z_][A-Za-z0-9_]*(?:\[\d+\])*(?:\.[A-Za-z_][A-Za-z0-9_]*(?:\[\d+\])*)*): ")


class PenumbraServerError(Exception):
    """Root of every error class of the server."""


def field_of(message: str) -> str:
    """The field a refusal message names at its start ("" if none)."""
    match = _FIELD_PREFIX.match(message)
    return match.group(1) if match else ""


class ServiceError(PenumbraServerError):
    """A request the service refuses, with the status code the client will see.

    Attributes:
        code: the gRPC status code.
        message: names the field at fault and what was expected.
        reason: UPPER_SNAKE reason (default: by code, :data:`DEFAULT_REASONS`).
        field: the offending field (default: the field path the message starts with).
    """

    def __init__(self, code: grpc.StatusCode, message: str, *, reason: str = "", field: str | None = None) -> None:
        super().__init__(message)
        self.code = code
        self.message = message
        self.reason = reason or DEFAULT_REASONS.get(code, "REFUSED")
        self.field = field_of(message) if field is None else field

    @classmethod
    def invalid(cls, message: str, *, reason: str = "", field: str | None = None) -> "ServiceError":
        return cls(grpc.StatusCode.INVALID_ARGUMENT, message, reason=reason, field=field)

    @classmethod
    def not_found(cls, message: str, *, reason: str = "", field: str | None = None) -> "ServiceError":
        return cls(grpc.StatusCode.NOT_FOUND, message, reason=reason, field=field)

    def trailing_metadata(self) -> tuple:
        """The ``grpc-status-details-bin`` trailer of this refusal (:func:`status_trailer`)."""
        return status_trailer(self.code, self.message, self.reason, self.field)

    def __repr__(self) -> str:
        return f"ServiceError({self.code.name}, {self.reason}, {self.message!r})"


def status_trailer(code: grpc.StatusCode, message: str, reason: str, field: str) -> tuple:
    """Trailing metadata carrying a google.rpc.Status with one google.rpc.ErrorInfo."""
    from google.protobuf import any_pb2
    from google.rpc import error_details_pb2, status_pb2
    from grpc_status import rpc_status

    info = error_details_pb2.ErrorInfo(reason=reason, domain=ERROR_DOMAIN, metadata={"field": field})
    detail = any_pb2.Any()
    detail.Pack(info)
    status = status_pb2.Status(code=code.value[0], message=message, details=[detail])
    return tuple(rpc_status.to_status(status).trailing_metadata)
