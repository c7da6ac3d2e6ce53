"""Calls made during one turn of the event loop, run back to back at the start of the next (``TurnBatch``).

Scoring one record costs a few microseconds of Python and numpy when its code and constants are in the CPU
caches, and several times that in a server, where the parsing, socket writes and kernel work of the requests in
between evict them (bench/README.md, "Where a single record's time goes"). Under load, many requests reach the
scoring step in the same turn of the loop: uvicorn starts the tasks of every connection that became readable
together. Running their calls one after another in one callback pays the cold start once per turn instead of
once per request.

Each call still runs alone, with the same code (its result is the one a direct call gives, bit for bit), in its
caller's context (the request id of log lines), and its exception goes to its caller only. With one request in
flight a turn holds one call, and the price is the wait for the next turn of the loop (a few microseconds).
"""

from __future__ import annotations

import asyncio
import contextvars
from typing import Any, Callable


class TurnBatch:
    """``await batch.call(function, *args)``: ``function(*args)``, run with the other calls of the same turn."""

    def __init__(self) -> None:
        self._loop: asyncio.AbstractEventLoop | None = None
        self._calls: list | None = None          # the calls of the current turn, not yet run

    def call(self, function: Callable[..., Any], *args: Any) -> asyncio.Future:
        loop = asyncio.get_running_loop()
        calls = self._calls
        if calls is None or loop is not self._loop:
            # The first call of this turn (or of another event loop, as tests start one per client).
            calls = self._calls = []
            self._loop = loop
            loop.call_soon(self._run, calls)
        future = loop.create_future()
        calls.append((future, contextvars.copy_context(), function, args))
        return future

    def _run(self, calls: list) -> None:
        if self._calls is calls:
            self._calls = None                    # calls made from here on wait for the next turn
        for future, context, function, args in calls:
            if future.done():                     # its caller was cancelled meanwhile
                continue
            try:
                result = context.run(function, *args)
            except Exception as exc:
                future.set_exception(exc)
            else:
                future.set_result(result)
