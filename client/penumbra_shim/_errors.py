"""Errors the shim raises: one hierarchy under :class:`PenumbraError`.

Each member also subclasses the built-in error it resembles, so callers may catch either::

    PenumbraError                                   every error of the shim
        SliceValidationError(ValueError)            a slice is refused before anything is sent
        CropError(ValueError)                       bad input to the crop (penumbra_shim.cropping)
        UnknownWireValueError(ValueError)           the server sent an enum value this shim does not know
        ServerError(RuntimeError)                   the server refused a call or could not be reached
            InvalidArgumentError(ValueError)        ... INVALID_ARGUMENT: the request was bad
            RunNotFoundError(LookupError)           ... NOT_FOUND: no run with that id

This module imports nothing beyond the standard library (grpc only for type names), so that
:mod:`penumbra_shim.cropping` stays usable with numpy alone; the server's reason and field are
read from the call's trailer by :mod:`penumbra_shim._rich_status` (protobuf) when a call fails.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import grpc

__all__ = [
    "PenumbraError",
    "SliceValidationError",
    "CropError",
    "UnknownWireValueError",
    "ServerError",
    "InvalidArgumentError",
    "RunNotFoundError",
    "error_from_rpc",
]


class PenumbraError(Exception):
    """Base of every error the shim raises.

    Attributes:
        code: the gRPC status code when the error came from a call (:class:`ServerError`);
            None for errors found in this process before anything was sent.
        details: the server's message (names the field at fault); "" when there was no call.
        method: the RPC that failed; "" when there was no call.
    """

    code: grpc.StatusCode | None = None
    details: str = ""
    method: str = ""


class SliceValidationError(PenumbraError, ValueError):
    """A slice fails validation before anything is sent; the message names the field."""


class CropError(PenumbraError, ValueError):
    """Bad input to the crop. The message names the field at fault."""


class UnknownWireValueError(PenumbraError, ValueError):
    """The server sent an enum value this shim has no name for (a newer server: upgrade the
    shim). The message names the field and the names this shim knows."""


class ServerError(PenumbraError, RuntimeError):
    """The server refused a call or could not be reached.

    Attributes:
        reason: the server's machine-readable reason (UPPER_SNAKE, e.g. "RUN_NOT_FOUND",
            "PART_INDEX_OUT_OF_RANGE"); "" when the server sent none (e.g. unreachable).
        field: the request field at fault (e.g. "header.part_index"); "" when none.
    """

    def __init__(self, code: grpc.StatusCode, details: str, *, method: str = "", reason: str = "",
                 field: str = "") -> None:
        self.code = code
        self.details = details
        self.method = method
        self.reason = reason
        self.field = field
        where = f"{method}: " if method else ""
        super().__init__(f"{where}{code.name}: {details}")


class InvalidArgumentError(ServerError, ValueError):
    """The server refused the request as invalid (INVALID_ARGUMENT); ``details`` names the field."""


class RunNotFoundError(ServerError, LookupError):
    """The server has no run with that id (NOT_FOUND)."""


#: Status codes (by name) with their own class; every other code becomes a plain :class:`ServerError`.
_CLASS_OF_CODE: dict[str, type[ServerError]] = {
    "INVALID_ARGUMENT": InvalidArgumentError,
    "NOT_FOUND": RunNotFoundError,
}


def error_from_rpc(exc: grpc.RpcError, method: str = "") -> ServerError:
    """The shim's error for a failed call: its class chosen by the status code."""
    import grpc

    from ._rich_status import error_details

    code = exc.code() if hasattr(exc, "code") else grpc.StatusCode.UNKNOWN
    details = exc.details() if hasattr(exc, "details") else str(exc)
    info = error_details(exc.trailing_metadata() if hasattr(exc, "trailing_metadata") else ())
    cls = _CLASS_OF_CODE.get(code.name, ServerError)
    return cls(code, details or "", method=method, reason=info.reason, field=info.field)
