"""The hand-over between a store's feed thread and the agent: events queued in order, one
wake-up per batch, and a stop flag both sides watch.

Both change feeds (redis_store.RedisFeed, postgres_store.PostgresFeed) read their store on a
thread of their own; the agent polls. This is the one place that queue and its locking live."""

from __future__ import annotations

import threading
from collections import deque

from shardsieve.node.store import FeedEvent, KeysAdded, KeysRemoved, Listed


def event_weight(event: FeedEvent) -> int:
    """What an event costs the queue: its keys for key-carrying events, else one."""
    return len(event.keys) if isinstance(event, (KeysAdded, KeysRemoved, Listed)) else 1


class FeedQueue:
    """Events from the feed thread to the poller, in order; `queued` counts their weight."""

    def __init__(self) -> None:
        self._events: deque[FeedEvent] = deque()
        self.cond = threading.Condition()    # also guards what a feed shares with its poller
        self.stopped = threading.Event()
        self.queued = 0

    def push(self, events: list[FeedEvent]) -> int:
        """Queue events with one wake-up; returns the weight now queued."""
        with self.cond:
            self._events.extend(events)
            self.queued += sum(event_weight(e) for e in events)
            self.cond.notify_all()
            return self.queued

    def replace(self, event: FeedEvent) -> None:
        """Drop everything queued and leave only `event` (a break makes what came before moot)."""
        with self.cond:
            self._events.clear()
            self._events.append(event)
            self.queued = event_weight(event)
            self.cond.notify_all()

    def poll(self, timeout: float) -> list[FeedEvent]:
        """Everything queued, waiting up to `timeout` s for the first event unless stopped."""
        with self.cond:
            if not self._events and not self.stopped.is_set():
                self.cond.wait(timeout)
            out = list(self._events)
            self._events.clear()
            self.queued = 0
            return out

    def stop(self) -> None:
        """Raise the stop flag and wake a waiting poller."""
        self.stopped.set()
        with self.cond:
            self.cond.notify_all()
