"""Errors the shim raises."""

from __future__ import annotations

import grpc

__all__ = ["PenumbraError", "RunNotFoundError", "SliceValidationError", "error_from_rpc"]


class SliceValidationError(ValueError):
    """A slice fails validation before anything is sent; the message names the field."""


class PenumbraError(RuntimeError):
    """The server refused a call or could not be reached.

    Attributes:
        code: the gRPC status code.
        details: the server's message (names the field at fault).
    """

    def __init__(self, code: grpc.StatusCode, details: str, *, method: str = "") -> None:
        self.code = code
        self.details = details
        self.method = method
        where = f"{method}: " if method else ""
        super().__init__(f"{where}{code.name}: {details}")


class RunNotFoundError(PenumbraError, LookupError):
    """The server has no run with that id (NOT_FOUND)."""


def error_from_rpc(exc: grpc.RpcError, method: str = "") -> PenumbraError:
    code = exc.code() if hasattr(exc, "code") else grpc.StatusCode.UNKNOWN
    details = exc.details() if hasattr(exc, "details") else str(exc)
    cls = RunNotFoundError if code == grpc.StatusCode.NOT_FOUND else PenumbraError
    return cls(code, details or "", method=method)
