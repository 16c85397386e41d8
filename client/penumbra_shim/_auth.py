"""Bearer tokens on every call, and TLS root certificates.

:class:`BearerTokens` wraps the stub so that each call carries ``authorization: Bearer
<token>``: the writer token of the run the call names, if this client holds it (returned by
OpenRun, or given to ``attach_run``), else the token given to ``connect`` (a reader, opener or
admin token), else nothing. It works on plaintext channels too (gRPC's own call credentials demand
TLS), which a loopback or trusted-network server with tokens needs.
"""

from __future__ import annotations

import itertools
import os
import threading
from pathlib import Path

import grpc

__all__ = ["BearerTokens", "channel_credentials", "request_run_id"]


def request_run_id(message) -> str:
    """The run a request names: its ``run_id``, or that of the oneof member set (a slice
    header); "" for none. The server's token check reads requests with this same function."""
    if message is None:
        return ""
    run_id = getattr(message, "run_id", None)
    if isinstance(run_id, str):
        return run_id
    for oneof in message.DESCRIPTOR.oneofs:
        which = message.WhichOneof(oneof.name)
        if which is not None:
            inner = getattr(getattr(message, which), "run_id", None)
            if isinstance(inner, str):
                return inner
    return ""


class BearerTokens:
    """The client's tokens: a default one and one writer token per run (thread-safe)."""

    def __init__(self, token: str | None = None) -> None:
        if token is not None and (not isinstance(token, str) or not token.strip() or "\n" in token.strip()):
            raise ValueError("token: expected a non-empty single-line string")
        self.token = token.strip() if token else None
        self._writers: dict[str, str] = {}
        self._lock = threading.Lock()

    def remember_writer(self, run_id: str, token: str) -> None:
        if token:
            with self._lock:
                self._writers[run_id] = token

    def writer_token(self, run_id: str) -> str | None:
        with self._lock:
            return self._writers.get(run_id)

    def metadata_for(self, run_id: str) -> tuple[tuple[str, str], ...]:
        token = (self.writer_token(run_id) if run_id else None) or self.token
        return (("authorization", f"Bearer {token}"),) if token else ()

    def wrap(self, stub, service_descriptor) -> "_StubWithTokens":
        """``stub`` whose calls carry the right token (same call signatures and errors)."""
        return _StubWithTokens(stub, service_descriptor, self)


class _StubWithTokens:
    """A stub's methods, each adding ``authorization`` metadata. Wrapping the stub rather than
    intercepting the channel keeps gRPC's own behaviour intact (a closed channel raises at the
    call, not later while iterating a stream)."""

    def __init__(self, stub, service_descriptor, tokens: BearerTokens) -> None:
        self._stub = stub
        self._streaming = {m.name for m in service_descriptor.methods if m.client_streaming}
        self._tokens = tokens

    def __getattr__(self, name: str):
        method = getattr(self._stub, name)
        tokens = self._tokens
        if name not in self._streaming:
            return _UnaryWithTokens(method, tokens)

        def call(request_iterator, *args, metadata=None, **kwargs):
            # The first message (a slice header) names the run: peek at it, then send it first.
            request_iterator = iter(request_iterator)
            first = next(request_iterator, None)
            requests = request_iterator if first is None else itertools.chain((first,), request_iterator)
            extra = tokens.metadata_for("" if first is None else request_run_id(first))
            return method(requests, *args, metadata=tuple(metadata or ()) + extra, **kwargs)
        return call


class _UnaryWithTokens:
    """A unary stub method adding the token, both as a call and as ``.future(...)``."""

    def __init__(self, method, tokens: BearerTokens) -> None:
        self._method = method
        self._tokens = tokens

    def _metadata(self, request, metadata):
        return tuple(metadata or ()) + self._tokens.metadata_for(request_run_id(request))

    def __call__(self, request, *args, metadata=None, **kwargs):
        return self._method(request, *args, metadata=self._metadata(request, metadata), **kwargs)

    def future(self, request, *args, metadata=None, **kwargs):
        return self._method.future(request, *args, metadata=self._metadata(request, metadata), **kwargs)


def _pem(value, what: str) -> bytes:
    if isinstance(value, bytes):
        return value
    if isinstance(value, str) and value.lstrip().startswith("-----BEGIN"):
        return value.encode()
    if isinstance(value, (str, os.PathLike)):
        path = Path(value)
        try:
            return path.read_bytes()
        except OSError as err:
            raise ValueError(f"{what}: cannot read {path}: {err.strerror}") from None
    raise TypeError(f"{what}: expected PEM bytes, PEM text or a path, got {type(value).__name__}")


def channel_credentials(root_certificates=None, *, certificate_chain=None,
                        private_key=None) -> grpc.ChannelCredentials:
    """TLS credentials from PEM bytes/text or paths: the CA that signed the server's certificate
    (None: the system's roots) and, for mutual TLS, this client's certificate and key."""
    if (certificate_chain is None) != (private_key is None):
        raise ValueError("certificate_chain, private_key: give both (mutual TLS) or neither")
    return grpc.ssl_channel_credentials(
        root_certificates=None if root_certificates is None else _pem(root_certificates, "root_certificates"),
        private_key=None if private_key is None else _pem(private_key, "private_key"),
        certificate_chain=None if certificate_chain is None else _pem(certificate_chain, "certificate_chain"),
    )
