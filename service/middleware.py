"""Pure ASGI middleware that keeps connections healthy: a time limit on slow request bodies, and a last
catch for unexpected errors that answers a plain 500 instead of letting the server drop the connection."""

from __future__ import annotations

import logging
import traceback

import anyio
import orjson

from service.errors import BodyTimeout

log = logging.getLogger("segscore")

INTERNAL_ERROR_BODY = orjson.dumps({"detail": "internal error; see the server log (quote the X-Request-ID)"})


class BodyReadTimeout:
    """A request body that sends nothing for ``seconds`` fails with BodyTimeout (408, connection closed).

    Only the body is timed: once it is complete, later ``receive`` calls (waiting for a disconnect) are
    passed through untouched. A client that drips its *headers* never reaches the application; see the
    README for what a reverse proxy must add for that."""

    def __init__(self, app, seconds: float) -> None:
        self.app = app
        self.seconds = seconds

    async def __call__(self, scope, receive, send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        body_done = False

        async def timed_receive():
            nonlocal body_done
            if body_done:
                return await receive()
            try:
                with anyio.fail_after(self.seconds):
                    message = await receive()
            except TimeoutError:
                raise BodyTimeout(self.seconds) from None
            if message["type"] != "http.request" or not message.get("more_body", False):
                body_done = True
            return message

        await self.app(scope, timed_receive, send)


class ErrorBoundary:
    """Turns an unexpected exception into a JSON 500 and does not re-raise it.

    Starlette's outermost error middleware re-raises after answering, and uvicorn then closes the
    connection without ``Connection: close``, so a pooled client's next request fails. Caught here, the
    response is complete and the keep-alive connection stays usable. The log line has the exception's type
    and the code location, not its message (which may quote a value from the request)."""

    def __init__(self, app) -> None:
        self.app = app

    async def __call__(self, scope, receive, send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = False

        async def tracking_send(message) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, receive, tracking_send)
        except Exception as exc:
            where = "".join(traceback.format_tb(exc.__traceback__))
            log.error("unexpected %s on %s %s\n%s", type(exc).__name__, scope["method"], scope["path"], where)
            if started:
                raise  # half a response is out: only closing the connection is left (the server does it)
            await send({"type": "http.response.start", "status": 500,
                        "headers": [(b"content-type", b"application/json"),
                                    (b"content-length", str(len(INTERNAL_ERROR_BODY)).encode())]})
            await send({"type": "http.response.body", "body": INTERNAL_ERROR_BODY})
