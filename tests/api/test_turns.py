"""TurnBatch (service/api/turns.py): calls made in one turn of the event loop run back to back in the next.

Reference: the definitions in the module's docstring, checked with asyncio's own scheduling (``asyncio.gather``
starts every task in the same turn; ``asyncio.sleep(0)`` yields exactly one turn).
"""

from __future__ import annotations

import asyncio
import contextvars

from service.api.turns import TurnBatch

caller = contextvars.ContextVar("caller", default="none")


def recording_runs(batch: TurnBatch) -> list[list]:
    """The first argument of each call in each list ``batch`` runs, one list per run, from now on."""
    runs: list[list] = []
    original = batch._run

    def recording(calls):
        runs.append([call.args[0] for call in calls])
        original(calls)

    batch._run = recording
    return runs


def test_calls_of_one_turn_run_together_in_order_each_with_its_own_result():
    batch = TurnBatch()
    runs = recording_runs(batch)

    async def one(i: int) -> int:
        return await batch.call(lambda x: x * x, i)

    async def main():
        first = await asyncio.gather(*(one(i) for i in range(5)))      # five tasks started in the same turn
        alone = await one(7)                                            # a later turn: a batch of its own
        return first, alone

    first, alone = asyncio.run(main())
    assert first == [0, 1, 4, 9, 16] and alone == 49
    assert runs == [[0, 1, 2, 3, 4], [7]]


def test_an_exception_goes_to_its_own_caller_only():
    batch = TurnBatch()

    def score(i: int) -> int:
        if i == 2:
            raise ValueError("record 2")
        return i

    async def main():
        return await asyncio.gather(*(batch.call(score, i) for i in range(4)), return_exceptions=True)

    results = asyncio.run(main())
    assert results[:2] == [0, 1] and results[3] == 3
    assert isinstance(results[2], ValueError) and str(results[2]) == "record 2"


def test_each_call_runs_in_its_callers_context():
    # The request id of log lines is a context variable: a call must see its own request's, not the first one's.
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
        tasks = [asyncio.ensure_future(waiter(i)) for i in range(3)]
        await asyncio.sleep(0)          # the tasks have made their calls and wait on them; the batch runs next turn
        tasks[1].cancel()               # cancels the future it waits on, before the batch runs
        return await asyncio.gather(*tasks, return_exceptions=True)

    done = asyncio.run(main())
    assert ran == [0, 2]
    assert isinstance(done[1], asyncio.CancelledError)


def test_a_new_event_loop_starts_afresh():
    # Test clients start an event loop each: calls left on a loop that stopped must not run in the next loop.
    batch = TurnBatch()
    ran: list[str] = []

    async def left_unrun():
        asyncio.ensure_future(batch.call(ran.append, "old loop"))
        await asyncio.sleep(0)                      # in this turn the call is made...
        asyncio.get_running_loop().stop()           # ...and the loop stops before the turn that would run it

    loop = asyncio.new_event_loop()
    loop.run_until_complete(left_unrun())

    async def main():
        return await asyncio.wait_for(batch.call(ran.append, "new loop"), 5)

    asyncio.run(main())
    loop.close()
    assert ran == ["new loop"]


def test_a_call_made_in_the_turn_its_batch_runs_waits_for_the_next_batch():
    batch = TurnBatch()
    runs = recording_runs(batch)

    async def main():
        first = asyncio.ensure_future(batch.call(str, "a"))     # makes its call in the next turn
        await asyncio.sleep(0)
        # This task makes its call in the turn where "a" resumes and runs its batch, after it: a new batch.
        second = asyncio.ensure_future(batch.call(str, "c"))
        return await asyncio.gather(first, second)

    assert asyncio.run(main()) == ["a", "c"]
    assert runs == [["a"], ["c"]]
