"""CountingBloomFilter: 4-bit saturating counters, the 0/1 view and its change sets."""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest

from shardsieve import bloom, checksum
from shardsieve.bloom import BloomFilter, CountingBloomFilter
from shardsieve.changeset import ChangeSet
from shardsieve.geometry import Geometry
from shardsieve.hashing import key_positions, positions

G = Geometry(1 << 12, 4, seed=9)


def _expected_counters(keys: list[bytes], g: Geometry) -> Counter[int]:
    counts: Counter[int] = Counter()
    for key in keys:
        counts.update(int(p) for p in key_positions(key, g))
    return counts


def test_counters_count_each_position_and_bits_follow_them() -> None:
    keys = [b"bin-%03d" % i for i in range(200)]
    cbf = CountingBloomFilter(G)
    cbf.add_batch(keys)
    expected = _expected_counters(keys, G)
    # a counting Bloom filter counter holds the number of (key, hash) hits on it, capped at 15
    # (Fan et al. 2000, section V.C: 4 bits per counter suffice)
    for p in range(G.bits):
        assert cbf.counter(p) == min(expected.get(p, 0), 15)
    assert cbf.set_count() == len(expected)
    assert cbf.contains_batch(keys).all()


def test_remove_clears_only_when_no_other_key_needs_the_bit() -> None:
    keys = [b"bin-%03d" % i for i in range(100)]
    cbf = CountingBloomFilter(G)
    cbf.add_batch(keys)
    cbf.remove_batch(keys[:50])
    survivors = keys[50:]
    assert cbf.contains_batch(survivors).all()
    expected = _expected_counters(survivors, G)
    assert [int(p) for p in cbf.bloom().set_positions()] == sorted(expected)


def test_single_and_batch_and_positions_calls_agree() -> None:
    keys = [b"shelf-%d" % i for i in range(300)]
    a, b, c = CountingBloomFilter(G), CountingBloomFilter(G), CountingBloomFilter(G)
    for key in keys:
        a.add(key)
    b.add_batch(keys)
    c.add_positions(positions(keys, G))
    assert a.bloom() == b.bloom() == c.bloom()
    for key in keys[:100]:
        a.remove(key)
    b.remove_batch(keys[:100])
    c.remove_positions(positions(keys[:100], G))
    assert a.bloom() == b.bloom() == c.bloom()
    assert a.checksum == b.checksum == c.checksum


def test_saturated_counters_are_never_decremented() -> None:
    cbf = CountingBloomFilter(G)
    key = b"hot-key"
    for _ in range(20):
        cbf.add(key)
    distinct = np.unique(key_positions(key, G)).size
    assert cbf.saturated_counters() == distinct
    for _ in range(20):
        cbf.remove(key)
    # pinned at 15: the bits stay set, so no false negative can appear
    # (docs/architecture.md#1-no-false-negatives-once-synced)
    assert cbf.contains(key)
    assert cbf.saturated_counters() == distinct
    assert [int(p) for p in cbf.saturated_positions()] == sorted({int(p) for p in key_positions(key, G)})


def test_counter_climbs_to_exactly_fifteen() -> None:
    cbf = CountingBloomFilter(G)
    key = b"warm-key"
    pos = key_positions(key, G)
    p = int(pos[0])
    hits_per_add = int(np.count_nonzero(pos == pos[0]))
    adds = 14 // hits_per_add
    for _ in range(adds):
        cbf.add(key)
    assert cbf.counter(p) == adds * hits_per_add
    for _ in range(5):
        cbf.add(key)
    assert cbf.counter(p) == 15


def test_removing_a_never_added_key_keeps_zero_counters_at_zero() -> None:
    # Documented misuse (the caller's bug): counters at 0 stay 0, nothing flips.
    cbf = CountingBloomFilter(G)
    cbf.remove(b"ghost")
    assert cbf.set_count() == 0 and cbf.take_changes().is_empty
    assert all(cbf.counter(int(p)) == 0 for p in key_positions(b"ghost", G))


def test_take_changes_reports_exact_flips() -> None:
    cbf = CountingBloomFilter(G)
    assert cbf.take_changes().is_empty                       # from empty at creation
    cbf.add_batch([b"a", b"b"])
    first = cbf.take_changes()
    assert np.array_equal(first.set_positions, np.unique(positions([b"a", b"b"], G)))
    assert first.cleared_positions.size == 0
    assert cbf.take_changes().is_empty                       # nothing changed since
    cbf.add(b"c")
    cbf.remove(b"c")                                         # net no change within one window
    assert cbf.take_changes().is_empty
    cbf.remove(b"a")
    second = cbf.take_changes()
    only_a = np.setdiff1d(np.unique(key_positions(b"a", G)), key_positions(b"b", G))
    assert np.array_equal(second.cleared_positions, only_a) and second.set_positions.size == 0


def test_change_sets_drive_a_replica_with_matching_checksum() -> None:
    cbf = CountingBloomFilter(G)
    replica = BloomFilter(G)
    keys = [b"item-%d" % i for i in range(400)]
    for lo in range(0, 400, 50):
        cbf.add_batch(keys[lo:lo + 50])
        cbf.remove_batch(keys[lo:lo + 20])
        replica.apply(cbf.take_changes())
        assert replica == cbf.bloom()
        assert replica.checksum == cbf.checksum
    # the checksum is the one shardsieve/checksum.py defines over the set positions
    assert cbf.checksum == checksum.xor_of(cbf.bloom().set_positions())


@pytest.mark.parametrize("takes_between", [False, True])
def test_many_flips_switch_to_a_baseline_and_stay_exact(monkeypatch: pytest.MonkeyPatch, takes_between: bool) -> None:
    monkeypatch.setattr(bloom, "_FLIP_LOG_MIN", 16)     # switch after a few flips
    cbf = CountingBloomFilter(G)
    replica = BloomFilter(G)
    switched = False
    for i in range(300):
        cbf.add(b"churn-%d" % i)
        cbf.remove(b"churn-%d" % i)
        cbf.add(b"keep-%d" % i)
        switched |= cbf._baseline is not None
        if takes_between and i % 97 == 0:
            replica.apply(cbf.take_changes())
    assert switched
    change = cbf.take_changes()
    replica.apply(change)
    assert replica == cbf.bloom() and replica.checksum == cbf.checksum
    assert cbf._baseline is None and cbf.take_changes().is_empty
    if not takes_between:
        assert change == ChangeSet.of(cbf.bloom().set_positions())
    # removing everything afterwards is reported as clears only
    for i in range(300):
        cbf.remove(b"keep-%d" % i)
    last = cbf.take_changes()
    assert last.set_positions.size == 0
    replica.apply(last)
    assert replica.set_count() == 0


def test_bloom_is_a_copy() -> None:
    cbf = CountingBloomFilter(G)
    cbf.add(b"x")
    view = cbf.bloom()
    cbf.add(b"y")
    assert view.contains(b"x") and view != cbf.bloom()
    assert view.checksum == checksum.xor_of(view.set_positions())


def test_statistics_follow_the_view() -> None:
    cbf = CountingBloomFilter(G)
    cbf.add_batch([b"s%d" % i for i in range(300)])
    view = cbf.bloom()
    assert cbf.fill() == view.fill()
    assert cbf.predicted_fpr() == view.predicted_fpr()
    assert cbf.estimated_cardinality() == view.estimated_cardinality()
    with pytest.raises(ValueError, match="outside the filter"):
        cbf.counter(G.bits)
