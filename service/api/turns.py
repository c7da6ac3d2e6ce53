"""Calls made during one turn of the event loop, run back to back at the start of the next (``TurnBatch``).

Scoring one record costs a few microseconds of Python and numpy when its code and constants are in the CPU
caches, and several times that in a server, where the parsing, socket writes and kernel work of the requests in
between evict them (bench/README.md, "Where a single-record request's time went"). Under load, many requests
reach the scoring step in the same turn of the loop: uvicorn starts the tasks of every connection that became
readable together. Running their calls one after another pays the cold start once per turn instead of once per
request.

Each caller adds its call to the turn's list and yields for one turn (``asyncio.sleep(0)``), so that the other
tasks of the turn add theirs; the first caller to resume runs the whole list, and the others find their results.
Each call still runs alone, with the same code (its result is the one a direct call gives, bit for bit), in its
caller's context (the request id of log lines); its exception goes to its caller only, and the call of a caller
cancelled while it waited is not run (it would count a record that is never answered). With one request in
flight the list holds one call, and the price is one turn of the loop (a few microseconds).
"""

from __future__ import annotations

import asyncio
import contextvars
from typing import Any, Callable


class _Call:
    __slots__ = ("function", "args", "context", "task", "state", "value")

    def __init__(self, function: Callable[..., Any], args: tuple) -> None:
        self.function, self.args = function, args
        self.context = contextvars.copy_context()
        self.task = asyncio.current_task()
        self.state = "waiting"           # then "cancelled", or "returned"/"raised" with its ``value``
        self.value: Any = None


class TurnBatch:
    """``await batch.call(function, *args)``: ``function(*args)``, run with the other calls of the same turn."""

    def __init__(self) -> None:
        self._loop: asyncio.AbstractEventLoop | None = None
        self._calls: list[_Call] | None = None       # the current turn's calls, not yet run

    async def call(self, function: Callable[..., Any], *args: Any) -> Any:
        loop = asyncio.get_running_loop()
        calls = self._calls
        if calls is None or loop is not self._loop:
            # The first call of this turn (or of another event loop, as tests start one per client).
            calls = self._calls = []
            self._loop = loop
        call = _Call(function, args)
        calls.append(call)
        try:
            await asyncio.sleep(0)       # one turn: the other tasks of this turn add their calls
        except BaseException:            # cancelled meanwhile: not run
            call.state = "cancelled"
            raise
        if call.state == "waiting":
            self._run(calls)
        if call.state == "raised":
            raise call.value
        return call.value

    def _run(self, calls: list[_Call]) -> None:
        if self._calls is calls:
            self._calls = None           # calls made from here on wait for the next turn
        for call in calls:
            if call.state != "waiting" or (call.task is not None and call.task.cancelling()):
                continue                 # cancelled, also when the cancellation is not yet delivered
            try:
                call.value = call.context.run(call.function, *call.args)
            except Exception as exc:
                call.state, call.value = "raised", exc
            else:
                call.state = "returned"
