"""Who may call what: a gRPC server interceptor that checks bearer tokens.

Every call carries ``authorization: Bearer <token>`` metadata. What a call needs:

==========================================================  ==================================
OpenRun                                                     an opener or admin token
SendSlice, CloseRun (of run R)                              R's writer token (from OpenRun)
GetRun, WatchRun, GetLatestSurfaces, GetLatestGuidance (R)  a reader or admin token, or R's
                                                            writer token
ListRuns, reflection, any method not named here             an admin token
grpc.health.v1.Health                                       nothing (probes stay simple)
==========================================================  ==================================

No token: UNAUTHENTICATED; a token that does not grant the call: PERMISSION_DENIED; both say
what is needed. With no tokens configured the server is open (every call passes): allowed only
on loopback or a network declared trusted (:func:`check_exposure`). Writer tokens are issued at
every OpenRun even then, so turning tokens on later protects runs opened before.

Why an interceptor: one place sees every call before any servicer code, so a new method is
denied (admin only) until someone decides otherwise, and the servicer stays about runs. The
interceptor sees only the method name and metadata; checks that need the run id wrap the
method's own handler (same kind: unary or streaming) and look at the request first.
"""

from __future__ import annotations

import inspect
import ipaddress
import logging

import grpc

from penumbra_shim._auth import request_run_id
from penumbra_shim._wire import horizons_pb2 as pb

from .errors import DEFAULT_REASONS, PenumbraServerError, status_trailer
from .tokens import TokenBook, TokenEntry, WriterTokens

__all__ = ["AuthInterceptor", "ExposureError", "check_exposure", "is_loopback_host", "METHOD_ACCESS"]

log = logging.getLogger("penumbra.server")

_SERVICE = pb.DESCRIPTOR.services_by_name["HorizonService"].full_name
_OPEN, _WRITE_RUN, _READ_RUN, _ADMIN, _PUBLIC = "open", "write-run", "read-run", "admin", "public"
#: Access class of each method (full name); anything missing needs an admin token.
METHOD_ACCESS = {
    f"/{_SERVICE}/OpenRun": _OPEN,
    f"/{_SERVICE}/SendSlice": _WRITE_RUN,
    f"/{_SERVICE}/CloseRun": _WRITE_RUN,
    f"/{_SERVICE}/RecordClientGap": _WRITE_RUN,
    f"/{_SERVICE}/AdmissionReserve": _WRITE_RUN,
    f"/{_SERVICE}/GetRun": _READ_RUN,
    f"/{_SERVICE}/WatchRun": _READ_RUN,
    f"/{_SERVICE}/GetLatestSurfaces": _READ_RUN,
    f"/{_SERVICE}/GetLatestGuidance": _READ_RUN,
    f"/{_SERVICE}/ListRuns": _ADMIN,
    "/grpc.health.v1.Health/Check": _PUBLIC,
    "/grpc.health.v1.Health/Watch": _PUBLIC,
}
_OPEN_RUN = f"/{_SERVICE}/OpenRun"
_HOW = "send metadata 'authorization: Bearer <token>'"


class ExposureError(PenumbraServerError, ValueError):
    """A server would listen beyond loopback without TLS and tokens, and was not told the
    network is trusted."""


def is_loopback_host(host: str) -> bool:
    """True for 127.0.0.0/8, ::1 and 'localhost'; False for wildcards, names and other addresses."""
    host = host.strip("[]")
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def check_exposure(host: str, *, tls: bool, tokens: bool, trusted_network: bool) -> None:
    """Raise :class:`ExposureError` unless ``host`` is loopback, or TLS and tokens are both on,
    or the network was declared trusted."""
    if is_loopback_host(host) or (tls and tokens) or trusted_network:
        return
    missing = " and ".join(what for what, on in (("TLS (--tls-cert, --tls-key)", tls),
                                                  ("tokens (--token-file)", tokens)) if not on)
    raise ExposureError(
        f"listen: {host} is not a loopback address, and the server has no {missing}; anyone who can reach "
        f"the port could read and write runs. Configure them, or pass --trusted-network (config: "
        f"server.trusted_network = true) if only trusted hosts can reach this network."
    )


def _bearer(metadata) -> str | None:
    for key, value in metadata or ():
        if key == "authorization":
            value = value.decode() if isinstance(value, bytes) else value
            scheme, _, token = value.partition(" ")
            return token.strip() if scheme.lower() == "bearer" else ""
    return None


def _short(method: str) -> str:
    return method.rsplit("/", 1)[-1]


class AuthInterceptor(grpc.aio.ServerInterceptor):
    """Checks every call against :data:`METHOD_ACCESS`; hands out writer tokens at OpenRun."""

    def __init__(self, book: TokenBook, writers: WriterTokens) -> None:
        self.book = book
        self.writers = writers

    @property
    def open(self) -> bool:
        return not self.book

    async def intercept_service(self, continuation, details):
        handler = await continuation(details)
        if handler is None:
            return None
        method = details.method
        if method == _OPEN_RUN:
            handler = self._issuing_writer_tokens(handler)
        if self.open:
            return handler
        access = METHOD_ACCESS.get(method, _ADMIN)
        if access == _PUBLIC:
            return handler
        token = _bearer(details.invocation_metadata)
        name = _short(method)
        if not token:
            needs = {_OPEN: "an opener or admin token", _WRITE_RUN: "the run's writer token (from OpenRun)",
                     _READ_RUN: "a reader or admin token, or the run's writer token"}.get(access, "an admin token")
            return _denying(handler, grpc.StatusCode.UNAUTHENTICATED,
                            f"{name}: no bearer token; this call needs {needs} ({_HOW})")
        entry = self.book.lookup(token)
        if access == _OPEN:
            if entry is not None and entry.role in ("opener", "admin"):
                return handler
            return _denying(handler, grpc.StatusCode.PERMISSION_DENIED,
                            f"{name}: needs an opener or admin token; {_describe(entry)}")
        if access == _ADMIN:
            if entry is not None and entry.role == "admin":
                return handler
            return _denying(handler, grpc.StatusCode.PERMISSION_DENIED,
                            f"{name}: needs an admin token; {_describe(entry)}")
        if access == _READ_RUN and entry is not None and entry.role in ("reader", "admin"):
            return handler
        needs = ("the run's writer token" if access == _WRITE_RUN
                 else "a reader or admin token, or the run's writer token")
        return _run_checking(handler, lambda run_id: self.writers.matches(run_id, token),
                             lambda run_id: f"{name}: run {run_id or '(none)'} needs {needs}; {_describe(entry)}")

    def _issuing_writer_tokens(self, handler):
        behaviour = handler.unary_unary
        writers = self.writers

        async def open_run(request, context):
            response = await behaviour(request, context)
            if response is not None and response.run.run_id:
                response.writer_token = writers.issue(response.run.run_id)
            return response

        return handler._replace(unary_unary=open_run)


def _describe(entry: TokenEntry | None) -> str:
    if entry is None:
        return "the token given is not a configured token nor this run's writer token"
    return f"the token given is {entry.name!r} with role {entry.role}"


def _kind(handler) -> str:
    return {(False, False): "unary_unary", (False, True): "unary_stream", (True, False): "stream_unary",
            (True, True): "stream_stream"}[(bool(handler.request_streaming), bool(handler.response_streaming))]


def _denying(handler, code: grpc.StatusCode, message: str):
    """A handler of the same kind as ``handler`` that aborts at once with ``code``."""

    async def deny(request_or_iterator, context):
        await context.abort(code, message,
                            trailing_metadata=status_trailer(code, message, DEFAULT_REASONS[code], "authorization"))

    return handler._replace(**{_kind(handler): deny})


def _run_checking(handler, allowed, message_for):
    """``handler`` preceded by a check of the run its (first) request names."""
    kind = _kind(handler)
    behaviour = getattr(handler, kind)

    async def check(context, request) -> None:
        run_id = request_run_id(request)
        if not allowed(run_id):
            message = message_for(run_id)
            await context.abort(grpc.StatusCode.PERMISSION_DENIED, message, trailing_metadata=status_trailer(
                grpc.StatusCode.PERMISSION_DENIED, message, "TOKEN_NOT_ALLOWED", "authorization"))

    if not handler.request_streaming:
        if inspect.isasyncgenfunction(behaviour):
            async def checked(request, context):
                await check(context, request)
                async for response in behaviour(request, context):
                    yield response
        else:
            async def checked(request, context):
                await check(context, request)
                return await behaviour(request, context)
        return handler._replace(**{kind: checked})

    async def first_and_rest(request_iterator):
        iterator = request_iterator.__aiter__()
        try:
            first = await iterator.__anext__()
        except StopAsyncIteration:
            first = None

        async def replay():
            if first is not None:
                yield first
                async for request in iterator:
                    yield request

        return first, replay()

    if inspect.isasyncgenfunction(behaviour):
        async def checked(request_iterator, context):
            first, requests = await first_and_rest(request_iterator)
            await check(context, first)
            async for response in behaviour(requests, context):
                yield response
    else:
        async def checked(request_iterator, context):
            first, requests = await first_and_rest(request_iterator)
            await check(context, first)
            return await behaviour(requests, context)
    return handler._replace(**{kind: checked})
