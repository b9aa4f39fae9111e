"""Hypothesis properties of the Bloom and counting filters (no false negatives:
docs/architecture.md#1-no-false-negatives-once-synced)."""

from __future__ import annotations

from collections import Counter

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shardsieve import checksum
from shardsieve.bloom import BloomFilter, CountingBloomFilter
from shardsieve.geometry import Geometry
from shardsieve.hashing import key_positions

SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])

geometries = st.builds(
    Geometry,
    bits=st.one_of(st.sampled_from([1024, 2048, 1 << 16]), st.integers(1024, 200_000)),
    hashes=st.integers(1, 12),
    seed=st.integers(0, 2**32 - 1),
)
keys = st.one_of(st.binary(max_size=40), st.text(max_size=20))
# a small key alphabet makes repeats (and so saturated counters) likely
small_keys = st.sampled_from([b"k%d" % i for i in range(12)] + ["ключ", "clé", ""])


@SETTINGS
@given(geometries, st.lists(keys, max_size=300), st.lists(keys, max_size=50))
def test_bloom_never_has_a_false_negative(g: Geometry, added: list[bytes | str], extra: list[bytes | str]) -> None:
    # Definition of a Bloom filter (Bloom 1970): every added key tests positive.
    bf = BloomFilter(g)
    bf.add_batch(added)
    for key in extra:
        bf.add(key)
    everything = added + extra
    assert bf.contains_batch(everything).all()
    assert all(bf.contains(key) for key in everything)


@SETTINGS
@given(geometries, st.lists(st.tuples(st.booleans(), small_keys), max_size=200))
def test_counting_bits_are_the_survivors_plus_saturated(g: Geometry, ops: list[tuple[bool, bytes | str]]) -> None:
    # Any add/remove sequence (removing only keys present, as a node does) leaves exactly the
    # bits of the surviving keys, plus bits pinned by saturated counters; survivors are never
    # missing (counting Bloom filter, Fan et al. 2000, with saturating counters).
    cbf = CountingBloomFilter(g)
    alive: Counter[bytes | str] = Counter()
    for is_add, key in ops:
        if is_add:
            cbf.add(key)
            alive[key] += 1
        elif alive[key] > 0:
            cbf.remove(key)
            alive[key] -= 1
    survivors = [k for k, c in alive.items() if c > 0]
    expected: set[int] = set()
    for key in survivors:
        expected.update(int(p) for p in key_positions(key, g))
    expected.update(int(p) for p in cbf.saturated_positions())
    assert [int(p) for p in cbf.bloom().set_positions()] == sorted(expected)
    assert all(cbf.contains(k) for k in survivors)


@SETTINGS
@given(geometries,
       st.lists(st.tuples(st.sampled_from(["add", "remove", "take", "add_batch", "remove_batch"]),
                          st.lists(small_keys, min_size=1, max_size=8)), max_size=60))
def test_change_sets_replayed_on_a_replica_reproduce_bits_and_checksum(
        g: Geometry, ops: list[tuple[str, list[bytes | str]]]) -> None:
    # take_changes accumulated over any op sequence and applied to a BloomFilter replica
    # reproduce the counting filter's 0/1 view and checksum exactly (shardsieve/checksum.py).
    cbf = CountingBloomFilter(g)
    replica = BloomFilter(g)
    alive: Counter[bytes | str] = Counter()
    for op, batch in ops:
        if op == "take":
            replica.apply(cbf.take_changes())
            assert replica.checksum == cbf.checksum
        elif op in ("add", "add_batch"):
            if op == "add":
                cbf.add(batch[0])
                batch = batch[:1]
            else:
                cbf.add_batch(batch)
            alive.update(batch)
        else:
            present = [k for k in batch if alive[k] > 0]
            present = list((Counter(present) & alive).elements())
            if op == "remove" and present:
                cbf.remove(present[0])
                alive[present[0]] -= 1
            elif present:
                cbf.remove_batch(present)
                alive.subtract(present)
    replica.apply(cbf.take_changes())
    assert replica == cbf.bloom()
    assert replica.checksum == cbf.checksum == checksum.xor_of(replica.set_positions())
    assert cbf.take_changes().is_empty


@SETTINGS
@given(geometries, st.lists(keys, max_size=200))
def test_bytes_round_trip(g: Geometry, added: list[bytes | str]) -> None:
    bf = BloomFilter(g)
    bf.add_batch(added)
    back = BloomFilter.from_bytes(g, bf.to_bytes())
    assert back == bf and back.checksum == bf.checksum


@SETTINGS
@given(geometries, st.lists(keys, min_size=1, max_size=100))
def test_hash_once_test_many(g: Geometry, probe: list[bytes | str]) -> None:
    # positions depend only on (key, geometry): testing positions equals testing keys
    from shardsieve.hashing import positions

    a, b = BloomFilter(g), BloomFilter(g)
    a.add_batch(probe[::2])
    b.add_batch(probe[1::2])
    pos = positions(probe, g)
    assert np.array_equal(a.contains_positions(pos), a.contains_batch(probe))
    assert np.array_equal(b.contains_positions(pos), b.contains_batch(probe))
