"""Races between an agent's listing, its change events and feed breaks never uncount a key
the agent did not count (docs/agents.md, "Exactness").

A simulated store the agent does not own: writes produce events that travel through an
in-flight buffer (delivered later, in order, like a subscriber's socket); listing batches
travel through another (a listing read on another connection, or by another thread), so
either may overtake the other; a break drops whatever is in flight. The real FeedApplier, MemoryKeyLedger and NodeCore apply the feed.

Checked after every step once live: the node's counting filter has exactly the bits of a
counting filter built from the ledger's keys (an uncount of an uncounted key would clear
or lower something the exact one keeps), the oracle being the library's own
CountingBloomFilter fed the keys directly. Checked after the feed settles: the ledger
equals the store's keys, and a plain Bloom filter of the store's keys is covered by the
agent's filter (zero false negatives) and equal to it. The contrast test shows the race is
real: counting events as they come clears another key's bit.
"""

from __future__ import annotations

import random
from collections import deque

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shardsieve import hashing
from shardsieve.bloom import BloomFilter, CountingBloomFilter
from shardsieve.geometry import geometry_for
from shardsieve.node.adapters.applier import AGENT_LIMITS, FeedApplier, FeedState
from shardsieve.node.adapters.ledger import AgentStore, MemoryKeyLedger
from shardsieve.node.core import NodeCore
from shardsieve.node.store import (
    FeedBroken,
    KeysAdded,
    KeysRemoved,
    Listed,
    ListingDone,
    ListingStarted,
    Mark,
)

UNIVERSE = [f"crate-{i:02d}".encode() for i in range(24)]


class SimStore:
    """The store, its in-flight events and its listing: one world driven by a seeded schedule."""

    def __init__(self, rng: random.Random, initial: set[bytes]) -> None:
        self.rng = rng
        self.keys = set(initial)
        self.feed: SimFeed | None = None
        self.url = "sim://kelp"
        self.resumable = False
        self.steps_left = 0

    # ExternalStore
    def open_feed(self, resume_from: str | None) -> "SimFeed":
        if self.feed is not None:
            self.feed.closed = True
        self.feed = SimFeed(self)
        return self.feed

    def exists_many(self, keys):  # type: ignore[no-untyped-def]
        return [k in self.keys for k in keys]

    def get_many(self, keys):  # type: ignore[no-untyped-def]
        return [b"v" if k in self.keys else None for k in keys]

    def put_many(self, items) -> None:  # type: ignore[no-untyped-def]
        for k, _ in items:
            self.write(k, add=True)

    def delete_many(self, keys) -> None:  # type: ignore[no-untyped-def]
        for k in keys:
            self.write(k, add=False)

    def close(self) -> None:
        pass

    # the world
    def write(self, key: bytes, add: bool) -> None:
        if add and key not in self.keys:
            self.keys.add(key)
            self.event(KeysAdded((key,)))
        elif not add and key in self.keys:
            self.keys.discard(key)
            self.event(KeysRemoved((key,)))

    def event(self, event) -> None:  # type: ignore[no-untyped-def]
        if self.feed is not None and not self.feed.closed:
            self.feed.in_flight.append(event)

    def step(self) -> None:
        """One random thing happens: a write, some deliveries, a listing read, or a break."""
        feed = self.feed
        assert feed is not None
        self.steps_left -= 1
        if self.steps_left < 0:     # quiet: deliver, then finish the listing, until settled
            if feed.in_flight:
                feed.queue.append(feed.in_flight.popleft())
            elif feed.listing_in_flight:
                feed.queue.append(feed.listing_in_flight.popleft())
            else:
                feed.list_step()
            return
        roll = self.rng.random()
        if roll < 0.45:
            self.write(self.rng.choice(UNIVERSE), add=self.rng.random() < 0.55)
        elif roll < 0.75:
            for _ in range(self.rng.randint(1, 4)):
                source = feed.in_flight if self.rng.random() < 0.6 else feed.listing_in_flight
                if source:
                    feed.queue.append(source.popleft())
        elif roll < 0.97:
            feed.list_step()
        else:
            feed.in_flight.clear()          # the subscription dropped: these events are lost
            feed.listing_in_flight.clear()
            feed.queue.append(FeedBroken("simulated drop"))
            feed.start_listing("after the drop")


class SimFeed:
    def __init__(self, store: SimStore) -> None:
        self.store = store
        self.origin = "sim"
        self.in_flight: deque = deque()           # change events on their way (in order)
        self.listing_in_flight: deque = deque()   # listing batches read but not handed over yet
        self.queue: deque = deque()
        self.closed = False
        self.tokens = 0
        self.pending_listing: list[bytes] | None = None
        self.start_listing("first listing")

    def start_listing(self, reason: str) -> None:
        self.queue.append(ListingStarted(reason))
        order = sorted(self.store.keys)
        self.store.rng.shuffle(order)
        self.pending_listing = order

    def list_step(self) -> None:
        """Read up to 3 of the keys present at the start that are still present (plus, at
        random, a key added since): the SCAN guarantees, read ahead of in-flight events."""
        if self.pending_listing is None:
            return
        batch = []
        while self.pending_listing and len(batch) < 3:
            key = self.pending_listing.pop()
            if key in self.store.keys:
                batch.append(key)
        extra = sorted(self.store.keys)
        if extra and self.store.rng.random() < 0.3:
            batch.append(self.store.rng.choice(extra))
        if batch:
            self.listing_in_flight.append(Listed(tuple(batch)))
        if not self.pending_listing:
            self.listing_in_flight.append(ListingDone())
            self.pending_listing = None

    def settled(self) -> bool:
        return not (self.in_flight or self.listing_in_flight or self.queue) and self.pending_listing is None

    # ChangeFeed
    def poll(self, timeout: float):  # type: ignore[no-untyped-def]
        if not self.closed:
            self.store.step()
        out = list(self.queue)
        self.queue.clear()
        return out

    def mark(self) -> int:
        self.tokens += 1
        self.in_flight.append(Mark(self.tokens, len(self.store.keys)))
        return self.tokens

    def confirm(self, position: int) -> None:
        pass

    def close(self) -> None:
        self.closed = True


def counting_of(keys, geometry) -> CountingBloomFilter:  # type: ignore[no-untyped-def]
    exact = CountingBloomFilter(geometry)
    if keys:
        exact.add_batch(sorted(keys))
    return exact


def run_schedule(seed: int, steps: int, marks: bool = True) -> None:
    rng = random.Random(seed)
    store = SimStore(rng, set(rng.sample(UNIVERSE, rng.randint(0, 12))))
    store.steps_left = steps
    ledger = MemoryKeyLedger()
    core = NodeCore("kelp-agent", AgentStore(ledger, store), capacity=64, target_fpr=0.05,
                    limits=AGENT_LIMITS, background_rebuild=False)
    applier = FeedApplier(store, ledger)
    applier.catch_up(timeout=1e9)
    core.load()
    applier.go_live(core, background=False)
    geometry = core.geometry
    for _ in range(steps + 400):
        applier.run_once()
        if marks and rng.random() < 0.1 and applier.state is FeedState.LIVE:
            store.feed.mark()  # type: ignore[union-attr]
        with core.lock:
            held = {bytes(k) for k in ledger.scan(None, 1000)}
            assert core.sync is not None
            assert core.sync.filter.bits == counting_of(held, geometry).bits, (
                f"seed {seed}: the filter differs from the ledger's keys (an uncount of an uncounted key)")
        feed = store.feed
        assert feed is not None
        if store.steps_left < 0 and feed.settled() and applier.state is FeedState.LIVE:
            break
    # settle: everything delivered, listing done, sweep done
    assert applier.state is FeedState.LIVE, f"seed {seed}: not settled ({applier.state})"
    assert set(ledger.scan(None, 1000)) == store.keys, f"seed {seed}: the ledger is not the store's keys"
    oracle = BloomFilter(geometry)
    if store.keys:
        oracle.add_batch(sorted(store.keys))
    agent_bits = core.sync.filter.bits  # type: ignore[union-attr]
    assert not (oracle.bits & ~agent_bits).any(), f"seed {seed}: a key of the store is missing (false negative)"
    assert oracle.bits == agent_bits, f"seed {seed}: the settled filter is not the exact one"


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), steps=st.integers(5, 120), marks=st.booleans())
def test_listing_events_and_breaks_never_uncount_an_uncounted_key(seed: int, steps: int, marks: bool) -> None:
    """marks=False: no count audits (the PostgreSQL feed has none), so the tombstones alone
    must keep a listing batch read before a removal from bringing the key back."""
    run_schedule(seed, steps, marks)


def _overlapping_pair(geometry):  # type: ignore[no-untyped-def]
    for i in range(10_000):
        a, b = f"dulse-{i}".encode(), f"laver-{i}".encode()
        pa = set(hashing.key_positions(a, geometry).tolist())
        pb = set(hashing.key_positions(b, geometry).tolist())
        if pa & pb and not pb <= pa:
            return a, b
    raise AssertionError("no overlapping pair found")


def test_counting_events_as_they_come_clears_another_keys_bit() -> None:
    """The contrast: a key deleted before the listing saw it, whose event arrives after the
    listing counted another key sharing a position. Counting every event uncounts the
    deleted key anyway and loses the other key's bit; the ledger refuses that uncount."""
    geometry = geometry_for(64, 0.05, 0)
    present, deleted = _overlapping_pair(geometry)
    naive = CountingBloomFilter(geometry)
    naive.add(present)           # the listing saw `present` (`deleted` was already gone)
    naive.remove(deleted)        # the delayed event of `deleted`, counted as it comes
    assert not naive.contains(present), "the race should have cleared a bit of the present key"

    store = SimStore(random.Random(0), {present})
    ledger = MemoryKeyLedger()
    core = NodeCore("kelp-agent", AgentStore(ledger, store), capacity=64, target_fpr=0.05, limits=AGENT_LIMITS,
                    background_rebuild=False)
    applier = FeedApplier(store, ledger)
    applier._feed = store.open_feed(None)  # noqa: SLF001 - drive the exact sequence by hand
    applier._apply([ListingStarted("first"), Listed((present,)), ListingDone()])  # noqa: SLF001
    core.load()
    applier.go_live(core, background=False)
    applier._apply([KeysRemoved((deleted,))])  # noqa: SLF001
    assert core.sync is not None and core.sync.filter.contains(present)
    assert applier.counters.keys_uncounted == 0
