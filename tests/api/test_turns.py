"""TurnBatch (service/api/turns.py): the first call of a quiet turn runs at once; the others of the turn run back
to back at the start of the next.

Reference: the definitions in the module's docstring, checked with asyncio's own scheduling (``asyncio.gather``
starts every task in the same turn; ``asyncio.sleep(0)`` yields exactly one turn).
"""

from __future__ import annotations

import asyncio
import contextvars

from service.api.turns import TurnBatch

caller = contextvars.ContextVar("caller", default="none")


def recording_runs(batch: TurnBatch) -> list[list]:
    """The first argument of each waiting call in each list ``batch`` runs, one list per turn, from now on."""
    runs: list[list] = []
    original = batch._run

    def recording(turn):
        runs.append([call.args[0] for call in turn.waiting])
        original(turn)

    batch._run = recording
    return runs


def test_a_lone_call_runs_at_once_and_a_turns_other_calls_together_in_the_next():
    batch = TurnBatch()
    runs = recording_runs(batch)
    order: list[str] = []

    async def one(i: int) -> int:
        return await batch.call(lambda x: order.append(f"call {x}") or x * x, i)

    async def main():
        asyncio.get_running_loop().call_soon(order.append, "next turn")
        alone = await one(7)                      # a quiet loop: it runs before the loop turns
        await asyncio.sleep(0)
        await asyncio.sleep(0)                    # a turn with no call: the loop is quiet again
        together = await asyncio.gather(*(one(i) for i in range(5)))    # five tasks started in the same turn
        return alone, together

    alone, together = asyncio.run(main())
    assert alone == 49 and together == [0, 1, 4, 9, 16]
    assert order[:2] == ["call 7", "next turn"]
    assert order[2:] == [f"call {i}" for i in range(5)]
    assert runs[-1] == [1, 2, 3, 4]               # the first of the five ran at once, the others waited a turn


def test_after_a_busy_turn_the_first_call_waits_too_and_after_a_quiet_one_it_does_not():
    batch = TurnBatch()
    runs = recording_runs(batch)

    async def main():
        await asyncio.gather(*(batch.call(str, f"burst {i}") for i in range(3)))      # busy: 3 calls in a turn
        await asyncio.gather(*(batch.call(str, f"next {i}") for i in range(2)))       # all of these wait
        await asyncio.sleep(0)                    # turns without calls leave the last verdict (busy) as it is
        lone = await batch.call(str, "lone")      # waits: the last turn with calls had two
        quiet = await batch.call(str, "quiet")    # at once: the last turn with calls had one
        return lone, quiet

    assert asyncio.run(main()) == ("lone", "quiet")
    waited = [run for run in runs if run]
    assert waited == [["burst 1", "burst 2"], ["next 0", "next 1"], ["lone"]]


def test_an_exception_goes_to_its_own_caller_only():
    batch = TurnBatch()

    def score(i: int) -> int:
        if i in (0, 2):                           # one raised at once (the turn's first), one while waiting
            raise ValueError(f"record {i}")
        return i

    async def main():
        return await asyncio.gather(*(batch.call(score, i) for i in range(4)), return_exceptions=True)

    results = asyncio.run(main())
    assert results[1] == 1 and results[3] == 3
    assert [str(results[i]) for i in (0, 2)] == ["record 0", "record 2"]
    assert all(isinstance(results[i], ValueError) for i in (0, 2))


def test_each_call_runs_in_its_callers_context():
    # The request id of log lines is a context variable: a call must see its own request's, not another's.
    batch = TurnBatch()

    async def one(name: str) -> str:
        caller.set(name)
        return await batch.call(caller.get)

    async def main():
        return await asyncio.gather(*(one(f"request-{i}") for i in range(3)))

    assert asyncio.run(main()) == ["request-0", "request-1", "request-2"]


def test_a_cancelled_callers_call_is_not_run():
    batch = TurnBatch()
    ran: list[int] = []

    async def waiter(i: int) -> None:
        await batch.call(ran.append, i)

    async def main():
        tasks = [asyncio.ensure_future(waiter(i)) for i in range(4)]
        await asyncio.sleep(0)          # the first ran at once; the others wait; their list runs next turn
        tasks[2].cancel()               # before the list runs
        return await asyncio.gather(*tasks, return_exceptions=True)

    done = asyncio.run(main())
    assert ran == [0, 1, 3]
    assert isinstance(done[2], asyncio.CancelledError)


def test_a_new_event_loop_starts_afresh():
    # Test clients start an event loop each: calls left on a loop that stopped must not run in the next loop,
    # and a loop that ended busy must not make the next loop's first call wait.
    batch = TurnBatch()
    ran: list[str] = []

    async def left_unrun():
        await asyncio.gather(*(batch.call(ran.append, f"old loop {i}") for i in range(3)))   # busy: all ran
        asyncio.ensure_future(batch.call(ran.append, "old loop, waiting"))
        await asyncio.sleep(0)                      # in this turn the call is made and waits (busy)...
        asyncio.get_running_loop().stop()           # ...and the loop stops before the turn that runs its list

    loop = asyncio.new_event_loop()
    loop.run_until_complete(left_unrun())

    async def main():
        asyncio.get_running_loop().call_soon(ran.append, "new loop, next turn")
        return await batch.call(ran.append, "new loop")

    asyncio.run(main())
    assert ran == ["old loop 0", "old loop 1", "old loop 2", "new loop", "new loop, next turn"]
    loop.set_exception_handler(lambda loop, context: None)     # its waiting caller is dropped unfinished
    loop.close()


def test_a_call_made_in_the_turn_its_list_runs_belongs_to_the_next_turn():
    batch = TurnBatch()
    runs = recording_runs(batch)

    async def main():
        first = [asyncio.ensure_future(batch.call(str, label)) for label in ("a", "b")]   # "b" waits a turn
        await asyncio.sleep(0)
        # This task makes its call in the turn whose start ran the list of "b", after it: a new turn's call.
        second = asyncio.ensure_future(batch.call(str, "c"))
        return await asyncio.gather(*first, second)

    assert asyncio.run(main()) == ["a", "b", "c"]
    assert [run for run in runs if run] == [["b"], ["c"]]       # "c" waited: the turn before was busy
