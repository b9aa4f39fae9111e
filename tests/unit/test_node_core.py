"""NodeCore: store and counting filter change together; rebuild scans with concurrent writes;
what NodeSync makes ready is carried out (durable meta, stream outboxes, scans).

Reference for every filter comparison: a counting Bloom filter built from scratch over the
keys the store holds at that moment (the definition of a counting Bloom filter: Fan, Cao,
Almeida & Broder, "Summary Cache", IEEE/ACM ToN 2000, section V.C — one counter per bit,
incremented per inserted key, decremented per deleted key). The store contents themselves are
checked against a plain dict model.
"""

from __future__ import annotations

import random

import numpy as np
import pytest

from shardsieve.node.core import META_EPOCH, InvalidInput, Limits, NodeCore, NotReady
from shardsieve.node.store import MemoryStore, StoreError, iter_all_keys
from shardsieve import hashing
from shardsieve.bloom import CountingBloomFilter
from shardsieve.geometry import geometry_for


def make_core(store: MemoryStore | None = None, capacity: int = 300, **kw: object) -> NodeCore:
    core = NodeCore("node-a", store or MemoryStore(), capacity=capacity, target_fpr=0.01,
                    limits=Limits(max_key_bytes=16, max_value_bytes=32, max_batch=8),
                    background_rebuild=False, storage_address="127.0.0.1:1", **kw)  # type: ignore[arg-type]
    core.load()
    return core


def reference_filter(store: MemoryStore, geometry) -> CountingBloomFilter:
    """A counting filter built from scratch over the store's keys (the reference)."""
    ref = CountingBloomFilter(geometry)
    keys = [k for batch in iter_all_keys(store) for k in batch]
    if keys:
        ref.add_positions(hashing.positions(keys, geometry))
    return ref


def counters(f: CountingBloomFilter) -> list[int]:
    return [f.counter(p) for p in range(f.geometry.bits)]


def current(core: NodeCore) -> CountingBloomFilter:
    """The filter coordinators route with (owned by NodeSync; read only)."""
    assert core.sync is not None
    return core.sync.filter


class ListOutbox:
    """A coordinator stream's outbox that keeps what it is sent."""

    def __init__(self, room: int = 1 << 20) -> None:
        self.messages: list = []
        self.space = room

    def room(self) -> int:
        return self.space

    def send(self, messages) -> None:  # type: ignore[no-untyped-def]
        self.messages.extend(messages)


def test_not_ready_before_load() -> None:
    core = NodeCore("n", MemoryStore(), capacity=10, target_fpr=0.01)
    with pytest.raises(NotReady):
        core.put_many([(b"k", b"v")])


def test_put_overwrite_delete_keep_filter_exact() -> None:
    store = MemoryStore()
    core = make_core(store)
    r = core.put_many([(b"apple", b"1"), (b"pear", b"2")])
    assert [x.created for x in r] == [True, True]
    assert current(core).contains(b"apple") and current(core).contains(b"pear")
    (cut,) = core.cut()
    before = current(core).bloom()
    r = core.put_many([(b"apple", b"3")])                  # overwrite: filter untouched
    assert r[0].created is False
    assert (r[0].epoch, r[0].sequence) == cut and current(core).bloom() == before
    r = core.delete_many([b"ghost"])                       # delete of a missing key: filter untouched
    assert r[0].created is False
    assert (r[0].epoch, r[0].sequence) == cut and core.cut() == []   # nothing pending: no delta
    r = core.delete_many([b"pear"])
    assert r[0].created is True
    assert counters(current(core)) == counters(reference_filter(store, core.geometry))
    assert core.key_count == 1 == store.count()


def test_random_operations_match_reference_filter() -> None:
    store = MemoryStore()
    core = make_core(store)
    model: dict[bytes, bytes] = {}
    rng = random.Random(11)
    for _ in range(400):
        keys = [f"k{rng.randrange(120)}".encode() for _ in range(rng.randrange(1, 8))]
        if rng.random() < 0.6:
            core.put_many([(k, b"v") for k in keys])
            model.update({k: b"v" for k in keys})
        else:
            core.delete_many(keys)
            for k in keys:
                model.pop(k, None)
    assert sorted(model) == [k for b in iter_all_keys(store) for k in b]
    ref = reference_filter(store, core.geometry)
    assert counters(current(core)) == counters(ref)
    assert current(core).bloom() == ref.bloom() and current(core).checksum == ref.checksum
    assert core.key_count == len(model)


def test_ack_sequence_is_the_delta_that_carries_the_write() -> None:
    core = make_core()
    ack = core.put_many([(b"k1", b"v")])[0]
    assert core.cut() == [(ack.epoch, ack.sequence)]
    ack2 = core.put_many([(b"k2", b"v")])[0]
    assert ack2.sequence == ack.sequence + 1
    core.cut()
    # nothing changed in the filter: the ack names the delta already cut, not one that may never come
    over = core.put_many([(b"k1", b"new value")])[0]
    gone = core.delete_many([b"never-there"])[0]
    assert (over.sequence, gone.sequence) == (ack2.sequence, ack2.sequence)
    assert core.cut() == []


@pytest.mark.parametrize("bad, limit", [
    ([(b"", b"v")], "empty key"),
    ([(b"x" * 17, b"v")], "max-key-bytes (16)"),
    ([(b"ok", b"v" * 33)], "max-value-bytes (32)"),
    ([(f"k{i}".encode(), b"v") for i in range(9)], "max-batch (8)"),
    ([(b"fine", b"v"), (b"", b"v")], "empty key"),
])
def test_bad_put_names_limit_and_changes_nothing(bad: list[tuple[bytes, bytes]], limit: str) -> None:
    store = MemoryStore()
    core = make_core(store)
    core.put_many([(b"keep", b"1")])
    checksum, count, stats = current(core).checksum, store.count(), core.stats()
    with pytest.raises(InvalidInput, match=__import__("re").escape(limit)):
        core.put_many(bad)
    assert current(core).checksum == checksum and store.count() == count and store.get(b"fine") is None
    assert core.stats()["writes"] == stats["writes"]


def test_bad_delete_and_get_change_nothing() -> None:
    store = MemoryStore()
    core = make_core(store)
    core.put_many([(b"keep", b"1")])
    with pytest.raises(InvalidInput, match="max-batch"):
        core.delete_many([b"keep"] * 9)
    with pytest.raises(InvalidInput, match="empty key"):
        core.get_many([b""])
    assert store.get(b"keep") == b"1" and current(core).contains(b"keep")
    assert core.stats()["reads"] == 0


def test_reads_and_wasted_probes_counted() -> None:
    core = make_core()
    core.put_many([(b"a", b"1")])
    assert core.get_many([b"a", b"b", b"c"]) == [b"1", None, None]
    s = core.stats()
    assert (s["reads"], s["reads_missed"]) == (3, 2)


def test_restart_starts_a_new_epoch() -> None:
    store = MemoryStore()
    first = make_core(store)
    first.put_many([(b"a", b"1")])
    second = make_core(store)
    assert second.epoch == first.epoch + 1
    assert current(second).contains(b"a") and second.key_count == 1


def test_rebuild_with_writes_during_scan_is_exact() -> None:
    """Writes below and above the cursor during the scan: the new filter must equal a filter
    built from scratch over the final store (no double count, no underflow)."""
    store = MemoryStore()
    core = make_core(store, scan_batch=7)
    rng = random.Random(5)
    core.put_many([(f"k{i:03d}".encode(), b"v") for i in range(0, 8)])
    for start in range(8, 200, 8):
        core.put_many([(f"k{i:03d}".encode(), b"v") for i in range(start, start + 8)])
    old_epoch = core.epoch
    new_geometry = geometry_for(2000, 0.001)
    assert new_geometry != core.geometry
    core.request_rebuild(capacity=2000, target_fpr=0.001, reason="test")
    assert core.stats()["rebuild_phase"] == "scanning"
    steps = 0
    while True:
        # random writes and deletes anywhere in the key space, between scan steps
        keys = [f"k{rng.randrange(260):03d}".encode() for _ in range(rng.randrange(1, 6))]
        if rng.random() < 0.5:
            core.put_many([(k, b"w") for k in keys])
        else:
            core.delete_many(keys)
        steps += 1
        if core.rebuild_step():
            break
    assert steps > 5  # the scan really was interleaved with writes
    # No coordinator is connected, so the hand-over completes at once (nobody to wait for).
    assert core.epoch == old_epoch + 1 and core.geometry == new_geometry
    ref = reference_filter(store, new_geometry)
    assert counters(current(core)) == counters(ref)
    assert current(core).checksum == ref.checksum
    # and writes after the switch keep it exact
    core.delete_many([b"k001", b"k150"])
    core.put_many([(b"zz-new", b"1")])
    ref = reference_filter(store, new_geometry)
    assert counters(current(core)) == counters(ref)
    # the new epoch and the rebuilt size were persisted and survive a restart
    assert store.get_meta(META_EPOCH) == str(core.epoch)
    again = make_core(store)
    assert again.geometry == new_geometry and again.stats()["capacity"] == 2000 and again.epoch == core.epoch + 1


def test_no_key_missing_from_the_routed_filter_during_rebuild() -> None:
    """While the scan runs, the filter coordinators route with (the current one) holds every key."""
    store = MemoryStore()
    core = make_core(store, scan_batch=5)
    core.put_many([(f"a{i}".encode(), b"v") for i in range(8)])
    core.request_rebuild(capacity=1000, target_fpr=0.01)
    while not core.rebuild_step():
        core.put_many([(f"b{random.random()}".encode()[:16], b"v")])
        keys = [k for b in iter_all_keys(store) for k in b]
        assert bool(np.all(current(core).contains_batch(keys)))


class GatedStore(MemoryStore):
    """A MemoryStore whose first write_batch waits for a gate; records every transaction."""

    def __init__(self) -> None:
        super().__init__()
        import threading

        self.gate = threading.Event()
        self.entered = threading.Event()
        self.transactions: list[int] = []
        self.fail_next = False

    def write_batch(self, ops):  # type: ignore[no-untyped-def]
        if not self.transactions:
            self.entered.set()
            self.gate.wait(10)
        if self.fail_next:
            self.fail_next = False
            raise StoreError("disk full (simulated)")
        self.transactions.append(len(ops))
        return super().write_batch(ops)


def test_concurrent_writers_share_one_commit() -> None:
    """Group commit: writers queued behind a commit in progress go out together in the next one."""
    import threading

    store = GatedStore()
    core = make_core(store)  # type: ignore[arg-type]
    results: dict[int, object] = {}

    def write(i: int) -> None:
        results[i] = core.put_many([(f"g{i}".encode(), b"v")])[0]

    first = threading.Thread(target=write, args=(0,))
    first.start()
    assert store.entered.wait(10)
    others = [threading.Thread(target=write, args=(i,)) for i in range(1, 6)]
    for t in others:
        t.start()
    from shardsieve.testing.procs import wait_until

    wait_until(lambda: len(core._queue) == 5, 10, message="five writers queued")
    store.gate.set()
    for t in [first, *others]:
        t.join(10)
    assert store.transactions == [1, 5]
    assert all(r.created for r in results.values())  # type: ignore[attr-defined]
    assert len({(r.epoch, r.sequence) for r in results.values()}) == 1  # type: ignore[attr-defined]
    assert counters(current(core)) == counters(reference_filter(store, core.geometry))


def test_failed_commit_fails_the_group_and_changes_nothing() -> None:
    store = GatedStore()
    store.gate.set()
    core = make_core(store)  # type: ignore[arg-type]
    core.put_many([(b"before", b"1")])
    checksum, keys = current(core).checksum, core.key_count
    store.fail_next = True
    with pytest.raises(StoreError, match="disk full"):
        core.put_many([(b"lost", b"1")])
    assert current(core).checksum == checksum and core.key_count == keys and store.get(b"lost") is None
    assert core.put_many([(b"after", b"1")])[0].created   # the node keeps working


def test_size_threshold_pushes_before_the_interval() -> None:
    """Changes are pushed every push interval, or sooner once the size threshold is reached
    (docs/architecture.md#3-bounded-staleness; docs/node.md, "Sync"). With a 60 s interval,
    only the threshold can explain a cut."""
    from shardsieve.node.pusher import ThreadedPusher
    from shardsieve.testing.procs import wait_until

    core = make_core(push_threshold=20)                 # k = 7 at fpr 0.01: 3 keys pass 20 bits
    assert core.geometry.hashes == 7
    pusher = ThreadedPusher(core, interval=60.0).start()
    wakes: list[int] = []
    wake = core.wake_pusher
    core.wake_pusher = lambda: (wakes.append(1), wake())[1]      # count the wake-ups, pass them on
    try:
        small = core.put_many([(b"t-small", b"v")])[0]  # 7 changed bits: below the threshold
        assert not wakes and core.stats()["sequence"] == 0
        core.put_many([(f"t-{i}".encode(), b"v") for i in range(3)])   # 21 more: threshold reached
        assert wakes == [1]
        wait_until(lambda: core.stats()["sequence"] >= small.sequence, 10,
                   message="a cut triggered by the size threshold")
        again = core.put_many([(b"t-small", b"new value")])[0]        # an overwrite: nothing pending
        assert (again.epoch, again.sequence) == (core.epoch, core.stats()["sequence"])   # the cut took it all
    finally:
        pusher.stop()


def test_rebuild_progress_is_visible_in_stats_and_log(caplog: pytest.LogCaptureFixture) -> None:
    """Rebuild progress shows in the node's stats (phase and a 0..1 figure that only grows)
    and in its log (docs/node.md, "Rebuild")."""
    import logging

    caplog.set_level(logging.INFO, logger="shardsieve.node.core")
    store = MemoryStore()
    core = make_core(store, scan_batch=10)
    for start in range(0, 80, 8):
        core.put_many([(f"p{i:03d}".encode(), b"v") for i in range(start, start + 8)])
    assert core.stats()["rebuild_phase"] == "" and core.stats()["rebuild_progress"] == 0.0
    core.request_rebuild(capacity=1000, target_fpr=0.01, reason="test")
    seen: list[float] = []
    while not core.rebuild_step():
        s = core.stats()
        assert s["rebuild_phase"] == "scanning"
        seen.append(float(s["rebuild_progress"]))
    assert len(seen) >= 7
    assert seen == sorted(seen) and 0 < seen[0] < seen[-1] <= 0.5     # the scan is the first half
    assert core.stats()["rebuild_phase"] == ""                           # no coordinator: done at once
    assert core.stats()["rebuilds_completed"] == 1 and core.stats()["rebuilds_abandoned"] == 0
    text = caplog.text
    assert "rebuild started" in text and "rebuild scan complete" in text


def test_a_stream_gets_its_hello_then_the_deltas_that_carry_acknowledged_writes() -> None:
    """What NodeSync makes ready reaches the stream's outbox: the Hello at once, the deltas
    once the coordinator answered (docs/sync-protocol.md, "Message flow")."""
    from shardsieve.v1 import sync_pb2

    core = make_core()
    outbox = ListOutbox()
    core.open_stream("coord-a", outbox, 0.0)
    (hello,) = outbox.messages
    assert hello.hello.node_id == "node-a" and hello.hello.epoch == core.epoch
    ack = core.put_many([(b"kelp", b"1")])[0]
    core.cut(0.0)
    assert len(outbox.messages) == 1                       # not answered yet: nothing but the Hello
    with core.sync_step(0.0) as sync:
        sync.receive("coord-a", sync_pb2.CoordinatorMessage(node_id="node-a", ack=sync_pb2.Ack(
            epoch=core.epoch, sequence=0, geometry=core.geometry.to_proto())), 0.0)
    delta = outbox.messages[-1].delta
    assert (delta.epoch, delta.sequence) == (ack.epoch, ack.sequence)
    assert core.peer_lag("coord-a") == 1                    # cut, not acknowledged
    outbox.space = 0                                        # queue full: nothing new goes out
    core.put_many([(b"kelp-2", b"1")])
    core.cut(0.0)
    assert len(outbox.messages) == 2
    core.close_stream("coord-a")
    assert core.peer_lag("coord-a") == -1


def test_a_failed_rebuild_scan_is_abandoned_and_its_epoch_burned() -> None:
    """A store error during the scan ends the rebuild: the old filter stays current, the
    epoch number it would have used is persisted so a restart never reuses it
    (docs/sync-protocol.md, "The rebuild hand-over" step 6)."""
    from shardsieve.testing.procs import wait_until

    class FailingScanStore(MemoryStore):
        failing = False

        def scan(self, after, limit):  # type: ignore[no-untyped-def]
            if self.failing:
                raise StoreError("read error (simulated)")
            return super().scan(after, limit)

    store = FailingScanStore()
    core = NodeCore("node-a", store, capacity=300, target_fpr=0.01, background_rebuild=True)
    core.load()
    core.put_many([(b"before", b"1")])
    epoch = core.epoch
    store.failing = True
    core.request_rebuild(capacity=1000, target_fpr=0.01)
    try:
        wait_until(lambda: core.stats()["rebuilds_abandoned"] == 1, 10, message="the rebuild abandoned")
    finally:
        core.stop()
    assert core.stats()["rebuild_phase"] == "" and core.epoch == epoch
    assert store.get_meta(META_EPOCH) == str(epoch + 1)       # the burned number
    assert current(core).contains(b"before")
