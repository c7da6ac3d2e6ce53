"""Calls made during one turn of the event loop, run back to back (``TurnBatch``).

Scoring one record costs a few microseconds of Python and numpy when its code and constants are in the CPU
caches, and several times that in a server, where the parsing, socket writes and kernel work of the requests in
between evict them (bench/README.md, "Where a single-record request's time went"). Under load, many requests
reach the scoring step in the same turn of the loop: uvicorn starts the tasks of every connection that became
readable together. Running their calls one after another pays the cold start once per turn instead of once per
request.

The first call of a turn runs at once, unless the last turn with calls had more than one (the loop is busy). Any
other call of the turn joins the turn's list and yields (``asyncio.sleep(0)``); at the start of the next turn a
callback runs the list, then the callers resume and find their results. So a lone request (one connection, a
quiet server) waits for nothing, and under load a burst's first turn batches all its calls but one, later turns
all of them. Each call still runs alone, with the same code (its result is the one a direct call gives, bit for
bit), in its caller's context (the request id of log lines); its exception goes to its caller only, and the call
of a caller cancelled while it waited is not run (it would count a record that is never answered).
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


class _Turn:
    __slots__ = ("calls", "waiting")

    def __init__(self) -> None:
        self.calls = 0                   # calls made in this turn, at once or waiting
        self.waiting: list[_Call] = []


class TurnBatch:
    """``await batch.call(function, *args)``: ``function(*args)``, run with the other calls of the same turn."""

    def __init__(self) -> None:
        self._loop: asyncio.AbstractEventLoop | None = None
        self._turn: _Turn | None = None      # the current turn, once a call was made in it
        self._busy = False                   # the last turn with calls had more than one

    async def call(self, function: Callable[..., Any], *args: Any) -> Any:
        loop = asyncio.get_running_loop()
        turn = self._turn
        if turn is None or loop is not self._loop:
            if loop is not self._loop:       # the first call on this event loop (tests start one per client)
                self._loop, self._busy = loop, False
            turn = self._turn = _Turn()
            loop.call_soon(self._close, turn)
            if not self._busy:
                turn.calls = 1
                return function(*args)       # alone as far as we know: at once
        turn.calls += 1
        call = _Call(function, args)
        turn.waiting.append(call)
        try:
            await asyncio.sleep(0)           # ``_close`` runs the turn's list before this task resumes
        except BaseException:                # cancelled meanwhile: not run
            call.state = "cancelled"
            raise
        if call.state == "waiting":          # only if the loop ran callbacks out of order; kept for safety
            self._run(turn)
        if call.state == "raised":
            raise call.value
        return call.value

    def _close(self, turn: _Turn) -> None:
        """At the start of the turn after ``turn``: calls made from here on belong to a new turn."""
        if self._turn is turn:               # (not a turn of an event loop that stopped and ran again)
            self._turn = None
            self._busy = turn.calls > 1
        self._run(turn)

    @staticmethod
    def _run(turn: _Turn) -> None:
        for call in turn.waiting:
            if call.state != "waiting" or (call.task is not None and call.task.cancelling()):
                continue                     # cancelled, also when the cancellation is not yet delivered
            try:
                call.value = call.context.run(call.function, *call.args)
            except Exception as exc:
                call.state, call.value = "raised", exc
            else:
                call.state = "returned"
