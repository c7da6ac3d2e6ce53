"""TurnBatch (service/api/turns.py): calls made in one turn of the event loop run back to back in the next.

Reference: the definitions in the module's docstring, checked with asyncio's own scheduling (``asyncio.gather``
starts every task in the same turn; ``asyncio.sleep(0)`` yields exactly one turn).
"""

from __future__ import annotations

import asyncio
import contextvars

import pytest

from service.api.turns import TurnBatch

caller = contextvars.ContextVar("caller", default="none")


def test_calls_of_one_turn_run_together_in_order_each_with_its_own_result():
    batch = TurnBatch()
    runs: list[list[int]] = []
    original = batch._run

    def recording(calls):
        runs.append([args[0] for _, _, _, args in calls])
        original(calls)

    batch._run = recording

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
    # Test clients start an event loop each: a batch left on a closed loop must not hold back the next loop's calls.
    batch = TurnBatch()

    async def left_unrun():
        batch.call(lambda: None)        # scheduled for the next turn, which this loop never reaches

    loop = asyncio.new_event_loop()
    loop.run_until_complete(left_unrun())
    loop.close()

    async def main():
        return await asyncio.wait_for(batch.call(lambda: "ran"), 5)

    assert asyncio.run(main()) == "ran"


@pytest.mark.parametrize("calls", [1, 3])
def test_a_call_made_while_a_batch_runs_waits_for_the_next_turn(calls):
    batch = TurnBatch()
    order: list[str] = []

    async def main():
        async def later():
            await asyncio.sleep(0)
            order.append("submitted during the batch's turn")
            return await batch.call(order.append, "second batch")

        def first(i: int) -> None:
            order.append(f"first batch {i}")

        waiting = asyncio.ensure_future(later())
        await asyncio.gather(*(batch.call(first, i) for i in range(calls)), waiting)

    asyncio.run(main())
    assert order[:calls] == [f"first batch {i}" for i in range(calls)]
    assert order[-1] == "second batch"
