"""The feed thread -> agent hand-over (node/adapters/feed_queue.py): order, weights, breaks, stop."""

from __future__ import annotations

import threading

from shardsieve.node.adapters.feed_queue import FeedQueue
from shardsieve.node.store import FeedBroken, KeysAdded, KeysRemoved, Listed, Mark


def test_events_come_out_in_order_and_weigh_their_keys() -> None:
    q = FeedQueue()
    assert q.push([KeysAdded((b"a", b"b")), Mark(7)]) == 3
    assert q.push([KeysRemoved((b"a",)), Listed((b"x", b"y", b"z"))]) == 7
    assert q.poll(0.0) == [KeysAdded((b"a", b"b")), Mark(7), KeysRemoved((b"a",)), Listed((b"x", b"y", b"z"))]
    assert q.queued == 0 and q.poll(0.0) == []


def test_a_break_replaces_what_was_queued() -> None:
    q = FeedQueue()
    q.push([KeysAdded((b"a",) * 10)])
    q.replace(FeedBroken("behind"))
    assert q.queued == 1
    assert q.poll(0.0) == [FeedBroken("behind")]


def test_a_waiting_poll_wakes_on_push_and_on_stop() -> None:
    q = FeedQueue()
    got: list[list] = []
    poller = threading.Thread(target=lambda: got.append(q.poll(30.0)))
    poller.start()
    q.push([Mark(1)])
    poller.join(10.0)
    assert got == [[Mark(1)]]
    stopper = threading.Thread(target=lambda: got.append(q.poll(30.0)))
    stopper.start()
    q.stop()
    stopper.join(10.0)
    assert not stopper.is_alive() and got[-1] == [] and q.stopped.is_set()
