"""FeedApplier: turns an external store's change feed into verified counts (docs/agents.md).

One thread applies the feed's events in their order, so every decision about a key sees the
ledger exactly as the events before it left it:

- KeysAdded / Listed: put the keys into the ledger; only the keys the ledger did not hold
  are counted (NodeCore counts the "created" flags).
- KeysRemoved: delete the keys from the ledger; only keys it held are uncounted.
  During a listing the removed keys are also remembered (tombstones): a listing batch read
  before the removal may arrive after it, and must not bring the key back.
- StoreEmptied: every ledger key is removed (uncounted once each).
- FeedBroken, then a new listing: the ledger may lack keys added meanwhile and hold keys
  removed meanwhile. The listing counts the missing ones; then a sweep asks the store
  whether each ledger key still exists and removes the ones that do not. Both go through
  the ledger, so the filter stays exact; the epoch does not change, the repair flows to
  coordinators as ordinary deltas.
- Mark: releases writers waiting for their write to be routable. A mark that carries the
  store's key count (Redis takes it atomically with the mark) audits the ledger while live:
  a different count means changes went unseen (SWAPDB, for one), and the applier lists the
  store again.

Before the node's filter exists (`catch_up`) the applier writes the ledger directly; after
`go_live(core)` it writes through NodeCore, whose store is the AgentStore around the same
ledger, so every ledger change and its count happen in one critical section.
"""

from __future__ import annotations

import itertools
import logging
import threading
import time
from dataclasses import dataclass
from enum import StrEnum
from typing import Callable, Protocol, Sequence

from shardsieve.node.core import Limits, NodeCore
from shardsieve.node.store import (
    ChangeFeed,
    ExternalStore,
    FeedBroken,
    FeedEvent,
    KeyLedger,
    KeysAdded,
    KeysRemoved,
    Listed,
    ListingDone,
    ListingStarted,
    Mark,
    StoreEmptied,
)
from shardsieve.sync.node_side import WriteStamp

log = logging.getLogger("shardsieve.node.agent")

#: Keys applied per ledger transaction: each is one SQLite commit (an fsync at sync level
#: "full") plus fixed work per call. 10,000 instead of 1,000 cut the PostgreSQL agent's CPU per
#: row from 8.9-10.6 to 6.5-9.6 us (`shardsieve bench agent`, measured side by side on one machine).
APPLY_BATCH = 10_000

#: Limits of an agent's NodeCore: the store decides key sizes (Redis allows 512 MiB), and
#: values never pass through it (a value above 0 bytes means a write was wired to the ledger
#: instead of FeedApplier.write).
AGENT_LIMITS = Limits(max_key_bytes=512 << 20, max_value_bytes=0, max_batch=APPLY_BATCH)

META_FEED_ORIGIN = "feed_origin"   # the ledger holds the changes of this feed (a replication slot)


class FeedState(StrEnum):
    CATCHING_UP = "catching-up"   # filling the ledger before the node's filter exists
    LIVE = "live"                 # every change the store made is in the ledger or on its way
    BROKEN = "broken"             # changes may have been lost; waiting for the store
    LISTING = "listing"           # a listing after a break: keys added meanwhile being counted
    SWEEPING = "sweeping"         # checking every ledger key against the store


class FeedTimeout(TimeoutError):
    """The feed did not reach the wanted point in time (the write itself is in the store)."""


class CountingSink(Protocol):
    """Where verified changes go: the ledger alone, or NodeCore (ledger + filter)."""

    def add(self, keys: Sequence[bytes]) -> int:
        """Put keys into the ledger; count the ones it did not hold. Returns how many."""

    def remove(self, keys: Sequence[bytes]) -> int:
        """Delete keys from the ledger; uncount the ones it held. Returns how many."""


class LedgerSink:
    """Before the filter exists: the ledger alone."""

    def __init__(self, ledger: KeyLedger) -> None:
        self.ledger = ledger

    def add(self, keys: Sequence[bytes]) -> int:
        return sum(self.ledger.put_many([(k, b"") for k in keys]))

    def remove(self, keys: Sequence[bytes]) -> int:
        return sum(self.ledger.delete_many(keys))


class NodeCoreSink:
    """After load: NodeCore over an AgentStore, so the ledger commit and the count share its lock."""

    def __init__(self, core: NodeCore) -> None:
        self.core = core

    def add(self, keys: Sequence[bytes]) -> int:
        # Keys come from the store, non-empty (the applier drops empty ones): no per-key check.
        return sum(self.core.write_checked("put", [(k, b"") for k in keys]))

    def remove(self, keys: Sequence[bytes]) -> int:
        return sum(self.core.write_checked("delete", list(keys)))

    def stamp(self) -> WriteStamp:
        """The position whose state holds every change recorded so far (NodeSync.record
        with nothing new returns exactly that)."""
        with self.core.sync_step() as sync:
            return sync.record()


@dataclass
class FeedCounters:
    keys_counted: int = 0        # ledger additions (each counted once)
    keys_uncounted: int = 0      # ledger removals (each uncounted once)
    listings: int = 0
    breaks: int = 0
    audits: int = 0
    audit_mismatches: int = 0
    swept: int = 0               # ledger keys found absent by a sweep


def coalesce(events: Sequence[FeedEvent]) -> list[FeedEvent]:
    """Merge runs of KeysAdded (or KeysRemoved) into one event, keeping order and the last
    position: applying a run at once changes nothing about which keys end up counted.
    Linear in the keys (a run is gathered in one list, not re-copied per event)."""
    out: list[FeedEvent] = []
    run: list[bytes] = []
    run_kind: type | None = None
    run_position: int | None = None

    def close_run() -> None:
        if run_kind is not None:
            out.append(run_kind(tuple(run), run_position))

    for event in events:
        kind = type(event) if isinstance(event, (KeysAdded, KeysRemoved)) else None
        if kind is not None and kind is run_kind:
            run.extend(event.keys)   # type: ignore[union-attr]
            if event.position is not None:   # type: ignore[union-attr]
                run_position = event.position   # type: ignore[union-attr]
            continue
        close_run()
        if kind is not None:
            run, run_kind, run_position = list(event.keys), kind, event.position   # type: ignore[union-attr]
        else:
            run, run_kind, run_position = [], None, None
            out.append(event)
    close_run()
    return out


class FeedApplier:
    """Applies one external store's feed to the agent's ledger and filter (see the module doc)."""

    def __init__(self, external: ExternalStore, ledger: KeyLedger, *, batch: int = APPLY_BATCH,
                 poll_interval: float = 0.05, clock: Callable[[], float] = time.monotonic,
                 on_state: Callable[[FeedState], None] | None = None) -> None:
        self.external = external
        self.ledger = ledger
        self.batch = batch
        self.poll_interval = poll_interval
        self.clock = clock
        self.counters = FeedCounters()
        self._sink: CountingSink = LedgerSink(ledger)
        self._core_sink: NodeCoreSink | None = None
        self._feed: ChangeFeed | None = None
        self._state = FeedState.CATCHING_UP
        self._tombstones: set[bytes] | None = None   # keys removed since the running listing began
        self._sweep_cursor: bytes | None = None
        self._listing_needs_sweep = False
        self._applied_token = 0
        self._waiting: dict[int, int] = {}           # waiter id -> mark token it waits for
        self._waiter_ids = itertools.count(1)
        self._cond = threading.Condition()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.last_error: str = ""
        self.last_listing_reason: str = ""
        # Told every state change, from the thread that made it (the daemon holds its sync
        # streams while the state is not LIVE: docs/agents.md, "Staleness and the new epoch").
        self.on_state = on_state

    # ------------------------------------------------------------------ views
    @property
    def state(self) -> FeedState:
        with self._cond:
            return self._state

    def _set_state(self, state: FeedState) -> None:
        """Change the state, wake the waiters and tell `on_state`."""
        with self._cond:
            if self._state is state:
                return
            self._state = state
            self._cond.notify_all()
        if self.on_state is not None:
            self.on_state(state)

    # ------------------------------------------------------------------ start-up
    def catch_up(self, timeout: float = 600.0, cancel: threading.Event | None = None,
                 progress: Callable[[int], None] | None = None) -> None:
        """Open the feed and fill the ledger: until the first listing is done, or, when the
        feed resumed where the ledger left off, until every change made so far is applied.
        Call before NodeCore.load (which then scans the ledger). `progress(keys counted)` is
        called about once a second."""
        # Resume only onto a ledger that kept its keys: a memory ledger starts empty, so the
        # changes a slot replays would not be enough (every key before them would be missing).
        origin = self.ledger.get_meta(META_FEED_ORIGIN) if self.ledger.durable else None
        self._feed = self.external.open_feed(origin if self.external.resumable else None)
        resumed = origin is not None and self._feed.origin == origin
        target = self._feed.mark() if resumed else None
        deadline = self.clock() + timeout
        next_report = self.clock() + 1.0
        while True:
            if cancel is not None and cancel.is_set():
                raise FeedTimeout("stopped while catching up with the store")
            if progress is not None and self.clock() >= next_report:
                progress(self.counters.keys_counted)
                next_report = self.clock() + 1.0
            self._apply(self._feed.poll(self.poll_interval))
            with self._cond:
                listed = self._state is FeedState.LIVE
                reached = target is not None and self._applied_token >= target
            if listed or reached:
                break
            if self.clock() > deadline:
                raise FeedTimeout(f"the store's listing did not finish within {timeout}s (state {self.state})")
        self._set_state(FeedState.LIVE)

    def go_live(self, core: NodeCore, background: bool = True) -> None:
        """From now on apply through `core` (loaded from this ledger), on a background thread
        (background=False: the caller drives run_once(), as unit tests do)."""
        if self._feed is None:
            raise RuntimeError("catch_up() must run before go_live()")
        self._core_sink = NodeCoreSink(core)
        self._sink = self._core_sink
        if background:
            self._thread = threading.Thread(target=self._run, name="agent-feed", daemon=True)
            self._thread.start()

    def run_once(self, timeout: float = 0.0) -> None:
        """Apply the events available now (waiting up to timeout s), then one sweep batch."""
        assert self._feed is not None
        self._apply(self._feed.poll(timeout))
        if self.state is FeedState.SWEEPING:
            self._sweep_step()

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(10.0)
        if self._feed is not None:
            self._feed.close()
        with self._cond:
            self._cond.notify_all()

    # ------------------------------------------------------------------ writes through the agent
    def write(self, items: Sequence[tuple[bytes, bytes]], timeout: float = 10.0) -> WriteStamp:
        """A write routed through a coordinator: commit it to the store, then wait until the
        feed brought it into the ledger and filter; returns the stamp for the WriteAck
        (docs/architecture.md#2-read-your-writes-through-a-coordinator). FeedTimeout: the
        write is in the store but not yet confirmed routable (the caller may retry it)."""
        self.external.put_many(items)
        return self.settle(timeout)

    def delete(self, keys: Sequence[bytes], timeout: float = 10.0) -> WriteStamp:
        """A delete routed through a coordinator (same contract as write)."""
        self.external.delete_many(keys)
        return self.settle(timeout)

    def settle(self, timeout: float = 10.0) -> WriteStamp:
        """Wait until every change the store committed before this call is applied (the feed
        is live and a mark issued now was reached); returns the position holding them."""
        if self._core_sink is None or self._feed is None:
            raise RuntimeError("the agent is not live yet (go_live() not called)")
        waiter = next(self._waiter_ids)
        token = self._feed.mark()
        deadline = self.clock() + timeout
        with self._cond:
            self._waiting[waiter] = token
            try:
                while not (self._state is FeedState.LIVE and self._applied_token >= self._waiting[waiter]):
                    left = deadline - self.clock()
                    if left <= 0 or self._stop.is_set():
                        raise FeedTimeout(f"the feed did not confirm the change within {timeout}s "
                                          f"(state {self._state}{': ' + self.last_error if self.last_error else ''})")
                    self._cond.wait(min(left, 0.5))
            finally:
                del self._waiting[waiter]
        return self._core_sink.stamp()

    # ------------------------------------------------------------------ the loop
    def _run(self) -> None:
        assert self._feed is not None
        reopen = ""
        while not self._stop.is_set():
            try:
                if reopen:
                    self._relist(reopen)
                    reopen = ""
                self.run_once(self.poll_interval)
            except Exception as exc:  # noqa: BLE001 - a store error must not end the agent
                self.last_error = f"{type(exc).__name__}: {exc}"
                log.exception("applying the store's changes failed; listing the store again")
                reopen = f"applying failed: {self.last_error}"
                self._stop.wait(1.0)

    def _relist(self, reason: str) -> None:
        """Close the feed and open a fresh one (its listing repairs the ledger in place)."""
        self._set_state(FeedState.BROKEN)
        self.counters.breaks += 1
        if self._feed is not None:
            try:
                self._feed.close()
            except Exception:  # noqa: BLE001 - the old feed is gone either way
                log.exception("closing the broken feed failed")
        self._feed = self.external.open_feed(None)
        log.warning("listing the store again", extra={"reason": reason})

    # ------------------------------------------------------------------ event rules
    def _apply(self, events: Sequence[FeedEvent]) -> None:
        for event in coalesce(events):
            if isinstance(event, KeysAdded):
                self._add([k for k in event.keys if k])
                self._confirm(event.position)
            elif isinstance(event, KeysRemoved):
                keys = [k for k in event.keys if k]
                if self._tombstones is not None:
                    self._tombstones.update(keys)
                self._remove(keys)
                self._confirm(event.position)
            elif isinstance(event, Listed):
                tomb = self._tombstones or ()
                self._add([k for k in event.keys if k and k not in tomb])
            elif isinstance(event, ListingStarted):
                self._on_listing_started(event)
            elif isinstance(event, ListingDone):
                self._on_listing_done()
            elif isinstance(event, StoreEmptied):
                self._on_emptied(event)
            elif isinstance(event, FeedBroken):
                self._on_broken(event)
            elif isinstance(event, Mark):
                self._on_mark(event)

    def _add(self, keys: list[bytes]) -> None:
        for i in range(0, len(keys), self.batch):
            self.counters.keys_counted += self._sink.add(keys[i:i + self.batch])

    def _remove(self, keys: list[bytes]) -> None:
        for i in range(0, len(keys), self.batch):
            self.counters.keys_uncounted += self._sink.remove(keys[i:i + self.batch])

    def _confirm(self, position: int | None) -> None:
        if position is not None and self._feed is not None:
            self._feed.confirm(position)

    def _on_listing_started(self, event: ListingStarted) -> None:
        self.counters.listings += 1
        self.last_listing_reason = event.reason
        self._tombstones = set()
        live = self._core_sink is not None
        if not live:
            # No filter yet: start from an empty ledger (exact without a sweep).
            self.ledger.clear()
            self._listing_needs_sweep = False
        else:
            self._listing_needs_sweep = True
        self._set_state(FeedState.LISTING if live else FeedState.CATCHING_UP)
        log.info("listing the store", extra={"reason": event.reason, "store": self.external.url})

    def _on_listing_done(self) -> None:
        self._tombstones = None
        assert self._feed is not None
        self.ledger.set_meta({META_FEED_ORIGIN: self._feed.origin})
        if self._listing_needs_sweep:
            self._sweep_cursor = None
            self._set_state(FeedState.SWEEPING)
        else:
            self._enter_live()

    def _sweep_step(self) -> None:
        """Check one batch of ledger keys against the store; remove the absent ones. Safe in any
        order with the events: a removal is applied only to a key the ledger holds, and a key
        added again later arrives as KeysAdded and is counted again."""
        keys = self.ledger.scan(self._sweep_cursor, self.batch)
        if not keys:
            self._enter_live()
            return
        present = self.external.exists_many(keys)
        gone = [k for k, here in zip(keys, present) if not here]
        self.counters.swept += len(gone)
        self._remove(gone)
        self._sweep_cursor = keys[-1]

    def _enter_live(self) -> None:
        self._set_state(FeedState.LIVE)
        with self._cond:
            waiting = bool(self._waiting)
        if waiting and self._feed is not None:
            # A mark issued now covers every write made before it: one committed before the
            # current subscription was listed (the listing just finished), any later one
            # comes as an event before this mark.
            token = self._feed.mark()
            with self._cond:
                for waiter in self._waiting:
                    self._waiting[waiter] = max(self._waiting[waiter], token)

    def _on_emptied(self, event: StoreEmptied) -> None:
        if self._tombstones is not None:
            self._relist("the store was emptied during a listing")
            return
        while True:
            keys = self.ledger.scan(None, self.batch)
            if not keys:
                break
            self._remove(keys)
        self._confirm(event.position)

    def _on_broken(self, event: FeedBroken) -> None:
        self.counters.breaks += 1
        self._tombstones = None
        if self._core_sink is not None:
            self._set_state(FeedState.BROKEN)
        self.last_error = event.reason
        log.warning("the store's change feed broke", extra={"reason": event.reason, "store": self.external.url})

    def _on_mark(self, event: Mark) -> None:
        # The audit comes before the waiters are released: a mark whose key count shows a
        # change the feed never reported (e.g. SWAPDB) must not confirm a settle() that waits
        # on it. After a mismatch the state is BROKEN, so the waiters wait for the new listing
        # (`_enter_live` then issues them a fresh mark).
        if event.store_count is not None and self.state is FeedState.LIVE and self._core_sink is not None:
            self.counters.audits += 1
            held = self.ledger.count()
            if held != event.store_count:
                self.counters.audit_mismatches += 1
                self._relist(f"key count differs: the store holds {event.store_count}, the ledger {held}")
        with self._cond:
            self._applied_token = max(self._applied_token, event.token)
            self._cond.notify_all()


def start_agent(node_id: str, external: ExternalStore, ledger: KeyLedger, *, capacity: int, target_fpr: float,
                seed: int = 0, catch_up_timeout: float = 600.0, **core_options: object) -> tuple[NodeCore, FeedApplier]:
    """Wire an agent: NodeCore over AgentStore(ledger, external), the ledger filled from the
    feed, the filter loaded from the ledger, then the feed applied live. The caller starts
    the pusher and the sync drivers as for any node, and stops `applier` before `core`."""
    from shardsieve.node.adapters.ledger import AgentStore

    core = NodeCore(node_id, AgentStore(ledger, external), capacity=capacity, target_fpr=target_fpr, seed=seed,
                    limits=AGENT_LIMITS, **core_options)  # type: ignore[arg-type]
    applier = FeedApplier(external, ledger)
    applier.catch_up(catch_up_timeout)
    core.load()
    applier.go_live(core)
    return core, applier
