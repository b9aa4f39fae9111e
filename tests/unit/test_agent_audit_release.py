"""A settle() waiting on a mark is not released by that mark when its key-count audit shows a
change the feed never reported (Redis SWAPDB sends no event: docs/agents.md): it is released
only after the new listing, so the filter then holds the store's keys (0 false negatives,
against a plain Bloom filter of the store's keys as the reference, Bloom 1970)."""

from __future__ import annotations

import threading
from collections import deque
from typing import Any, Sequence

from shardsieve.bloom import BloomFilter
from shardsieve.node.adapters.applier import AGENT_LIMITS, FeedApplier, FeedState
from shardsieve.node.adapters.ledger import AgentStore, MemoryKeyLedger
from shardsieve.node.core import NodeCore
from shardsieve.node.store import FeedEvent, Listed, ListingDone, ListingStarted, Mark
from shardsieve.testing.procs import wait_until


class ScriptedStore:
    """A store whose keys can change silently; each feed lists them at once when opened."""

    url = "scripted://kelp-ledger"
    resumable = False

    def __init__(self, keys: set[bytes]) -> None:
        self.keys = set(keys)
        self.feed: ScriptedFeed | None = None
        self.feeds_opened = 0

    def open_feed(self, resume_from: str | None) -> ScriptedFeed:
        self.feeds_opened += 1
        self.feed = ScriptedFeed(self)
        return self.feed

    def exists_many(self, keys: Sequence[bytes]) -> list[bool]:
        return [k in self.keys for k in keys]

    def get_many(self, keys: Sequence[bytes]) -> list[bytes | None]:
        return [b"kelp" if k in self.keys else None for k in keys]

    def close(self) -> None:
        pass


class ScriptedFeed:
    def __init__(self, store: ScriptedStore) -> None:
        self.store = store
        self.origin = "scripted"
        self.tokens = 0
        self.lock = threading.Lock()
        self.queue: deque[FeedEvent] = deque(
            [ListingStarted("opened"), Listed(tuple(sorted(store.keys))), ListingDone()])

    def poll(self, timeout: float) -> list[FeedEvent]:
        with self.lock:
            out = list(self.queue)
            self.queue.clear()
        return out

    def mark(self) -> int:
        with self.lock:
            self.tokens += 1
            self.queue.append(Mark(self.tokens, len(self.store.keys)))
            return self.tokens

    def confirm(self, position: int) -> None:
        pass

    def close(self) -> None:
        pass


class WatchedLedger(MemoryKeyLedger):
    """The ledger; its count() (taken by the audit) can wait to see whether a settle() returned."""

    def __init__(self) -> None:
        super().__init__()
        self.settled = threading.Event()
        self.watch = False
        self.released_before_audit: bool | None = None

    def count(self) -> int:
        if self.watch and self.released_before_audit is None:
            # The waiter runs on its own thread: give it a second to return, were it released.
            self.released_before_audit = self.settled.wait(timeout=1.0)
        return super().count()


def test_a_mark_whose_audit_mismatches_does_not_release_a_waiting_settle() -> None:
    store = ScriptedStore({b"harvest:1", b"harvest:2"})
    ledger = WatchedLedger()
    core = NodeCore("brinewick-cache", AgentStore(ledger, store), capacity=1000, target_fpr=0.01,  # type: ignore[arg-type]
                    limits=AGENT_LIMITS, background_rebuild=False)
    applier = FeedApplier(store, ledger)  # type: ignore[arg-type]
    applier.catch_up(timeout=10)
    core.load()
    applier.go_live(core, background=False)
    assert applier.state is FeedState.LIVE and store.feeds_opened == 1

    store.keys = {f"order:{i}".encode() for i in range(40)}   # swapped in: no event at all
    outcome: dict[str, Any] = {}

    def waiter() -> None:
        try:
            outcome["stamp"] = applier.settle(timeout=30)
        finally:
            ledger.settled.set()

    ledger.watch = True
    thread = threading.Thread(target=waiter)
    thread.start()
    feed = store.feed
    assert feed is not None
    wait_until(lambda: feed.tokens == 1, 10.0, message="settle() to issue its mark")
    for _ in range(10):                    # audit -> relist -> listing -> sweep -> live -> mark
        applier.run_once()
        if not thread.is_alive():
            break
    thread.join(timeout=30)
    assert ledger.released_before_audit is False, "the mismatching mark released the waiter before the audit"
    assert store.feeds_opened == 2 and applier.counters.audit_mismatches == 1
    assert "stamp" in outcome and applier.state is FeedState.LIVE
    reference = BloomFilter(core.geometry)
    reference.add_batch(sorted(store.keys))
    with core.lock:
        assert core.sync is not None
        agent_bits = core.sync.filter.bits
    assert not (reference.bits & ~agent_bits).any(), "a key of the store is missing from the filter"
