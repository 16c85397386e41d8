"""One error type for everything a request can get wrong: a gRPC status code and a message that
names the field at fault and what was expected. Servicers turn it into an aborted call."""

from __future__ import annotations

import grpc

__all__ = ["ServiceError"]


class ServiceError(Exception):
    """A request the service refuses, with the status code the client will see."""

    def __init__(self, code: grpc.StatusCode, message: str) -> None:
        super().__init__(message)
        self.code = code
        self.message = message

    @classmethod
    def invalid(cls, message: str) -> "ServiceError":
        return cls(grpc.StatusCode.INVALID_ARGUMENT, message)

    @classmethod
    def not_found(cls, message: str) -> "ServiceError":
        return cls(grpc.StatusCode.NOT_FOUND, message)

    def __repr__(self) -> str:
        return f"ServiceError({self.code.name}, {self.message!r})"
