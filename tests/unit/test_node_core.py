"""NodeCore: store and counting filter change together; rebuild scans with concurrent writes.

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

from shardsieve.node.core import InvalidInput, Limits, NodeCore, NotReady
from shardsieve.node.store import MemoryStore, iter_all_keys
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


def test_not_ready_before_load() -> None:
    core = NodeCore("n", MemoryStore(), capacity=10, target_fpr=0.01)
    with pytest.raises(NotReady):
        core.put_many([(b"k", b"v")])


def test_put_overwrite_delete_keep_filter_exact() -> None:
    store = MemoryStore()
    core = make_core(store)
    r = core.put_many([(b"apple", b"1"), (b"pear", b"2")])
    assert [x.created for x in r] == [True, True]
    assert core.filter.contains(b"apple") and core.filter.contains(b"pear")
    core.cut()
    before = core.filter.bloom()
    r = core.put_many([(b"apple", b"3")])                  # overwrite: filter untouched
    assert r[0].created is False
    assert core.filter.take_changes().is_empty and core.filter.bloom() == before
    r = core.delete_many([b"ghost"])                       # delete of a missing key: filter untouched
    assert r[0].created is False
    assert core.filter.take_changes().is_empty
    r = core.delete_many([b"pear"])
    assert r[0].created is True
    assert counters(core.filter) == counters(reference_filter(store, core.geometry))
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
    assert counters(core.filter) == counters(ref)
    assert core.filter.bloom() == ref.bloom() and core.filter.checksum == ref.checksum
    assert core.key_count == len(model)


def test_ack_sequence_is_the_delta_that_carries_the_write() -> None:
    core = make_core()
    ack = core.put_many([(b"k1", b"v")])[0]
    deltas = core.cut()
    assert len(deltas) == 1
    assert (deltas[0].epoch, deltas[0].sequence) == (ack.epoch, ack.sequence)
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
    checksum, count, stats = core.filter.checksum, store.count(), core.stats()
    with pytest.raises(InvalidInput, match=__import__("re").escape(limit)):
        core.put_many(bad)
    assert core.filter.checksum == checksum and store.count() == count and store.get(b"fine") is None
    assert core.stats()["writes"] == stats["writes"]


def test_bad_delete_and_get_change_nothing() -> None:
    store = MemoryStore()
    core = make_core(store)
    core.put_many([(b"keep", b"1")])
    with pytest.raises(InvalidInput, match="max-batch"):
        core.delete_many([b"keep"] * 9)
    with pytest.raises(InvalidInput, match="empty key"):
        core.get_many([b""])
    assert store.get(b"keep") == b"1" and core.filter.contains(b"keep")
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
    assert second.filter.contains(b"a") and second.key_count == 1


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
    core.request_rebuild(capacity=2000, target_fpr=0.001, reason="test")
    assert core.rebuild is not None
    new_geometry = core.rebuild.filter.geometry
    assert new_geometry == geometry_for(2000, 0.001)
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
    assert counters(core.filter) == counters(ref)
    assert core.filter.checksum == ref.checksum
    # and writes after the switch keep it exact
    core.delete_many([b"k001", b"k150"])
    core.put_many([(b"zz-new", b"1")])
    ref = reference_filter(store, new_geometry)
    assert counters(core.filter) == counters(ref)
    # the rebuilt size is persisted and survives a restart
    again = make_core(store)
    assert again.geometry == new_geometry and again.capacity == 2000


def test_no_key_missing_from_the_routed_filter_during_rebuild() -> None:
    """While the scan runs, the filter coordinators route with (the current one) holds every key."""
    store = MemoryStore()
    core = make_core(store, scan_batch=5)
    core.put_many([(f"a{i}".encode(), b"v") for i in range(8)])
    core.request_rebuild(capacity=1000, target_fpr=0.01)
    while not core.rebuild_step():
        core.put_many([(f"b{random.random()}".encode()[:16], b"v")])
        keys = [k for b in iter_all_keys(store) for k in b]
        assert bool(np.all(core.filter.contains_batch(keys)))


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
            from shardsieve.node.store import StoreError

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
    assert counters(core.filter) == counters(reference_filter(store, core.geometry))


def test_failed_commit_fails_the_group_and_changes_nothing() -> None:
    from shardsieve.node.store import StoreError

    store = GatedStore()
    store.gate.set()
    core = make_core(store)  # type: ignore[arg-type]
    core.put_many([(b"before", b"1")])
    checksum, keys = core.filter.checksum, core.key_count
    store.fail_next = True
    with pytest.raises(StoreError, match="disk full"):
        core.put_many([(b"lost", b"1")])
    assert core.filter.checksum == checksum and core.key_count == keys and store.get(b"lost") is None
    assert core.put_many([(b"after", b"1")])[0].created   # the node keeps working


def test_size_threshold_pushes_before_the_interval() -> None:
    """Issue 3 point 3: changes are pushed every push interval, or sooner once the size
    threshold is reached. With a 60 s interval, only the threshold can explain a cut."""
    import threading

    from shardsieve.testing.procs import wait_until

    core = make_core(push_threshold=20)                 # k = 7 at fpr 0.01: 3 keys pass 20 bits
    assert core.geometry.hashes == 7
    core.put_many([(b"t-small", b"v")])                 # 7 changed bits: below the threshold
    assert not core._push_now.is_set()
    cuts: list[int] = []
    cut_seen = threading.Event()

    def on_cut(deltas: list, now: float) -> None:
        cuts.append(len(deltas))
        cut_seen.set()

    core.cut_hooks.append(on_cut)
    core.start_pusher(interval=60.0)
    try:
        core.put_many([(f"t-{i}".encode(), b"v") for i in range(3)])   # 21 more: threshold reached
        wait_until(cut_seen.is_set, 10, message="a cut triggered by the size threshold")
        assert cuts and cuts[0] >= 1
        assert core.filter.take_changes().is_empty     # the cut took every pending change
    finally:
        core.stop_pusher()


def test_rebuild_progress_is_visible_in_stats_and_log(caplog: pytest.LogCaptureFixture) -> None:
    """Issue 3 point 5: rebuild progress shows in the node's stats (phase and a 0..1 figure
    that only grows) and in its log."""
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
