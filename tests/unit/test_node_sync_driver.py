"""SyncDriver reconnects with jittered exponential backoff and bounds its send queue
(docs/node.md, "Sync"; docs/architecture.md#3-bounded-staleness: a coordinator that went
away is reached again soon, and a stalled one never piles up memory).

The backoff rule checked here is the "jitter" family of AWS Architecture Blog, "Exponential
Backoff And Jitter" (Brooker, 2015): the ceiling doubles per failed attempt up to a cap and
the actual delay is drawn uniformly below it; a stream that worked resets the doubling. No
socket is opened: each stream attempt is replaced by a scripted outcome and the waits are
recorded instead of slept.
"""

from __future__ import annotations

import asyncio
import random

from shardsieve.node.sync_driver import SyncDriver


class _Core:
    """SyncDriver's constructor and reconnect loop touch nothing of the core (each stream
    attempt is scripted below)."""


def _run(outcomes: list[bool], seed: int, lo: float = 0.1, hi: float = 3.0) -> list[float]:
    """The driver's reconnect loop over scripted stream outcomes; the backoff waits it asked
    for, recorded instead of slept (the loop stops after the last outcome's wait)."""
    driver = SyncDriver(_Core(), "127.0.0.1:9", backoff_min=lo, backoff_max=hi, rng=random.Random(seed))
    script = iter(outcomes)
    waits: list[float] = []

    async def one_stream() -> bool:
        return next(script)

    async def pause(delay: float) -> bool:
        waits.append(delay)
        return len(waits) >= len(outcomes)     # True: stopping

    async def main() -> None:
        driver._stopping = asyncio.Event()
        driver._one_stream = one_stream  # type: ignore[method-assign]
        driver._pause = pause  # type: ignore[method-assign]
        await driver._run()

    asyncio.run(main())
    return waits


def test_ceiling_doubles_per_failure_up_to_the_cap() -> None:
    lo, hi = 0.1, 3.0
    waits = _run([False] * 12, seed=7, lo=lo, hi=hi)
    assert len(waits) == 12
    for failures, delay in enumerate(waits, start=1):
        ceiling = min(hi, lo * 2 ** failures)
        assert 0 < delay <= ceiling, (failures, delay, ceiling)
    # late delays, drawn below the 3 s cap, are well above the first ceiling (0.2 s): it grew
    assert max(waits[6:]) > 4 * lo * 2
    assert all(d <= hi for d in waits)


def test_delays_are_jittered_not_fixed() -> None:
    # the same failure count under different seeds gives different delays (randomised, so
    # many nodes reconnecting after one outage spread out: the point of jitter)
    tenth = {round(_run([False] * 10, seed=s)[-1], 6) for s in range(8)}
    assert len(tenth) == 8
    # and one sequence is not simply the ceilings
    waits = _run([False] * 10, seed=3)
    assert any(d < min(3.0, 0.1 * 2 ** n) * 0.99 for n, d in enumerate(waits, start=1))


def test_a_stream_that_worked_resets_the_doubling() -> None:
    lo, hi = 0.1, 30.0
    waits = _run([False] * 8 + [True] + [False], seed=11, lo=lo, hi=hi)
    # after the working stream the ceiling is back at the minimum, and after one more
    # failure at twice the minimum
    assert waits[8] <= lo
    assert waits[9] <= 2 * lo


def test_a_full_send_queue_gets_no_send_budget() -> None:
    # the driver's bound on its queue (module docstring): NodeSync is given room for this
    # stream only while fewer than MAX_QUEUED messages wait, so a stalled coordinator costs
    # at most that many queued messages, never an unbounded pile
    from shardsieve.node.sync_driver import MAX_QUEUED, StreamOutbox
    from shardsieve.stream_pump import Outbox
    from shardsieve.sync.node_side import SEND_BUDGET_BYTES
    from shardsieve.v1 import sync_pb2

    async def check() -> None:
        queued: Outbox[sync_pb2.NodeMessage] = Outbox(MAX_QUEUED)
        queued.bind(asyncio.get_running_loop())
        outbox = StreamOutbox(queued)
        assert outbox.room() == SEND_BUDGET_BYTES
        outbox.send([sync_pb2.NodeMessage()] * (MAX_QUEUED - 1))
        assert outbox.room() == SEND_BUDGET_BYTES and len(queued) == MAX_QUEUED - 1
        outbox.send([sync_pb2.NodeMessage()])
        assert outbox.room() == 0
        await queued.next()                 # the writer took one
        assert outbox.room() == SEND_BUDGET_BYTES

    asyncio.run(check())
