"""Pure ASGI middleware: the request id, a time limit on slow request bodies, and a last catch for
unexpected errors that answers a plain 500 instead of letting the server drop the connection."""

from __future__ import annotations

import asyncio
import logging
import traceback

import orjson

from service.errors import BodyTimeout
from service.logs import request_id_from, request_id_var

log = logging.getLogger("segscore")

INTERNAL_ERROR_BODY = orjson.dumps({"detail": "internal error; see the server log (quote the X-Request-ID)"})
# The two ASGI messages of that 500 (a complete answer: the keep-alive connection stays usable).
INTERNAL_ERROR_START = {"type": "http.response.start", "status": 500,
                        "headers": [(b"content-type", b"application/json"),
                                    (b"content-length", str(len(INTERNAL_ERROR_BODY)).encode())]}
INTERNAL_ERROR_END = {"type": "http.response.body", "body": INTERNAL_ERROR_BODY}


class HttpMiddleware:
    """Base: ``handle`` sees HTTP requests only; other ASGI traffic (lifespan) passes straight through."""

    def __init__(self, app) -> None:
        self.app = app

    async def __call__(self, scope, receive, send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
        else:
            await self.handle(scope, receive, send)

    async def handle(self, scope, receive, send) -> None:
        raise NotImplementedError


class RequestIdMiddleware(HttpMiddleware):
    """Set the request id for the request's duration (log lines read it) and send it back as ``X-Request-ID``."""

    async def handle(self, scope, receive, send) -> None:
        sent = next((value.decode("latin-1") for name, value in scope["headers"] if name == b"x-request-id"), None)
        request_id = request_id_from(sent)
        token = request_id_var.set(request_id)

        async def send_with_id(message) -> None:
            if message["type"] == "http.response.start":
                headers = [(k, v) for k, v in message.get("headers", []) if k.lower() != b"x-request-id"]
                headers.append((b"x-request-id", request_id.encode()))
                message = {**message, "headers": headers}
            await send(message)

        try:
            await self.app(scope, receive, send_with_id)
        finally:
            request_id_var.reset(token)


class _Resumed:
    """Awaits the rest of an awaitable whose first step already ran (``receive_one_within``): each value it
    yields (the future it waits on) goes up to the task, and what the task sends or throws back (a result, a
    cancellation) goes down to it, exactly as ``await`` would have done from the start."""

    __slots__ = ("step", "pending")

    def __init__(self, step, pending) -> None:
        self.step, self.pending = step, pending

    def __await__(self):
        step, pending = self.step, self.pending
        while True:
            try:
                sent = yield pending
            except GeneratorExit:
                step.close()
                raise
            except BaseException as exc:
                try:
                    pending = step.throw(exc)
                except StopIteration as done:
                    return done.value
            else:
                try:
                    pending = step.send(sent)
                except StopIteration as done:
                    return done.value


async def receive_one_within(receive, seconds: float) -> dict:
    """``await receive()``, or BodyTimeout (408, connection closed) when nothing arrives for ``seconds``.

    A message that is already there (a small body arrives with the headers) is returned from the first step
    of ``receive()``, with no timer. Only a ``receive()`` that has to wait gets one: a bare loop timer that
    cancels this task when it expires (~2 us per timer, where anyio.fail_after cost ~11 us and asyncio.timeout
    ~5 us, on a single-record request of a few tens of us)."""
    step = receive().__await__()
    try:
        pending = step.send(None)
    except StopIteration as done:
        return done.value
    task = asyncio.current_task()
    expired = False

    def expire() -> None:
        nonlocal expired
        expired = True
        task.cancel()

    timer = asyncio.get_running_loop().call_later(seconds, expire)
    try:
        return await _Resumed(step, pending)
    except asyncio.CancelledError:
        if not expired:
            raise
        task.uncancel()
        raise BodyTimeout(seconds) from None
    finally:
        timer.cancel()


def timed_receive(receive, seconds: float):
    """``receive`` with a time limit on the body (``receive_one_within`` per call while the body is incomplete).
    Once the body is complete, later calls (waiting for a disconnect) are passed through untouched. Used by
    ``BodyReadTimeout`` and by the assign lane's other bodies (service/api/assign.py), which are read outside
    this middleware stack."""
    body_done = False

    async def timed() -> dict:
        nonlocal body_done
        if body_done:
            return await receive()
        message = await receive_one_within(receive, seconds)
        if message["type"] != "http.request" or not message.get("more_body", False):
            body_done = True
        return message

    return timed


class BodyReadTimeout(HttpMiddleware):
    """A request body that sends nothing for ``seconds`` fails with BodyTimeout (408, connection closed).

    Only the body is timed (``timed_receive``). A client that drips its *headers* never reaches the
    application; see the README for what a reverse proxy must add for that."""

    def __init__(self, app, seconds: float) -> None:
        super().__init__(app)
        self.seconds = seconds

    async def handle(self, scope, receive, send) -> None:
        await self.app(scope, timed_receive(receive, self.seconds), send)


class ErrorBoundary(HttpMiddleware):
    """Turns an unexpected exception into a JSON 500 and does not re-raise it.

    Starlette's outermost error middleware re-raises after answering, and uvicorn then closes the
    connection without ``Connection: close``, so a pooled client's next request fails. Caught here, the
    response is complete and the keep-alive connection stays usable. The log line has the exception's type
    and the code location, not its message (which may quote a value from the request)."""

    async def handle(self, scope, receive, send) -> None:
        started = False

        async def tracking_send(message) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, receive, tracking_send)
        except Exception as exc:
            log_unexpected(exc, scope)
            if started:
                raise  # half a response is out: only closing the connection is left (the server does it)
            await send(INTERNAL_ERROR_START)
            await send(INTERNAL_ERROR_END)


def log_unexpected(exc: Exception, scope) -> None:
    """The log line of an unexpected exception: its type and the code location, never its message."""
    where = "".join(traceback.format_tb(exc.__traceback__))
    log.error("unexpected %s on %s %s\n%s", type(exc).__name__, scope["method"], scope["path"], where)
