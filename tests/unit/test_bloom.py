"""BloomFilter: membership, byte layout, checksum, change sets, serialisation."""

from __future__ import annotations

import numpy as np
import pytest
from bitarray import bitarray

from shardsieve import bloom, checksum
from shardsieve.bloom import BloomFilter, FilterDivergedError, estimated_cardinality
from shardsieve.changeset import ChangeSet
from shardsieve.geometry import Geometry, GeometryError
from shardsieve.hashing import key_positions, positions

G = Geometry(1 << 16, 5, seed=3)
KEYS = [b"crate-%05d" % i for i in range(2000)]


def _recomputed_checksum(bf: BloomFilter) -> int:
    # shardsieve/checksum.py definition: XOR of mix64 over every set position.
    return checksum.xor_of([i for i, bit in enumerate(bf.bits) if bit])


def test_added_keys_are_members_and_batch_equals_single() -> None:
    single = BloomFilter(G)
    for key in KEYS:
        single.add(key)
    batch = BloomFilter(G)
    batch.add_batch(KEYS)
    assert single == batch
    assert all(single.contains(key) for key in KEYS)
    assert batch.contains_batch(KEYS).all()
    absent = [b"other-%05d" % i for i in range(2000)]
    assert batch.contains_batch(absent).tolist() == [batch.contains(k) for k in absent]


def _unique(a: np.ndarray) -> np.ndarray:
    # sort + neighbour compare (np.unique is very slow on uint64 in numpy 2.4)
    s = np.sort(a.ravel())
    return s[np.concatenate(([True], s[1:] != s[:-1]))] if s.size else s


def test_bits_are_exactly_the_key_positions() -> None:
    # bit p set <=> p is a position of some added key (definition of a Bloom filter, Bloom 1970)
    bf = BloomFilter(G)
    bf.add_batch(KEYS)
    expected = _unique(positions(KEYS, G))
    assert np.array_equal(bf.set_positions(), expected)
    assert bf.set_count() == expected.size


def test_byte_layout_is_little_endian_bit_order() -> None:
    # docs/hash-scheme.md: bit p is bit p mod 8 (least significant first) of byte p // 8
    bf = BloomFilter(Geometry(1024, 1))
    bf.apply(ChangeSet.of([0, 9, 1023]))
    raw = bf.to_bytes()
    assert len(raw) == 128
    assert raw[0] == 0b00000001 and raw[1] == 0b00000010 and raw[127] == 0b10000000
    assert sum(raw[2:127]) == 0


def test_bulk_and_small_batches_agree_and_keep_checksum() -> None:
    big = BloomFilter(G)
    big.add_batch(KEYS * 10)   # bulk path (scratch scatter), checksum recomputed lazily
    small = BloomFilter(G)
    for i in range(0, len(KEYS), 7):
        small.add_batch(KEYS[i:i + 7])   # small batches keep the checksum exact as they go
    assert big == small
    assert small._checksum is not None
    assert big.checksum == small.checksum == _recomputed_checksum(small)


def test_large_filter_uses_the_retry_scatter_path(monkeypatch: pytest.MonkeyPatch) -> None:
    # filters above the scratch limit take the duplicate-safe retry kernel
    monkeypatch.setattr(bloom, "_SCRATCH_MAX_BITS", 1 << 12)
    g = Geometry(1 << 14, 3)
    bf = BloomFilter(g)
    keys = [b"k%d" % i for i in range(1 << 14)]   # many positions share a byte
    bf.add_batch(keys)
    assert bf.contains_batch(keys).all()
    assert bf.set_count() == _unique(positions(keys, g)).size


def test_contains_positions_matches_contains_batch() -> None:
    bf = BloomFilter(G)
    bf.add_batch(KEYS[:1000])
    probe = KEYS[500:1500]
    assert np.array_equal(bf.contains_positions(positions(probe, G)), bf.contains_batch(probe))
    with pytest.raises(ValueError, match="shape"):
        bf.contains_positions(np.zeros((3, 4), dtype=np.uint64))
    with pytest.raises(ValueError, match="outside the filter"):
        bf.contains_positions(np.full((1, 5), G.bits, dtype=np.uint64))


def test_statistics() -> None:
    bf = BloomFilter(G)
    assert bf.fill() == 0.0 and bf.predicted_fpr() == 0.0 and bf.estimated_cardinality() == 0.0
    bf.add_batch(KEYS)
    x = bf.set_count()
    assert bf.fill() == x / G.bits
    assert bf.predicted_fpr() == pytest.approx((x / G.bits) ** G.hashes)   # fill^k
    # Swamidass & Baldi (2007): n = -(m/k) ln(1 - X/m)
    assert bf.estimated_cardinality() == pytest.approx(-(G.bits / G.hashes) * np.log(1 - x / G.bits))
    assert estimated_cardinality(G, G.bits) == float("inf")


def test_apply_sets_clears_and_tracks_checksum() -> None:
    bf = BloomFilter(G)
    bf.add_batch(KEYS[:50])
    replica = bf.copy()
    before = replica.checksum
    to_clear = bf.set_positions()[:10]
    free = np.setdiff1d(np.arange(100, dtype=np.uint64), bf.set_positions())[:10]
    change = ChangeSet.of(free, to_clear)
    replica.apply(change)
    assert replica.checksum == change.checksum_after(before) == _recomputed_checksum(replica)
    assert all(replica.bits[int(p)] for p in free)
    assert not any(replica.bits[int(p)] for p in to_clear)


@pytest.mark.parametrize("bad", ["set_already_one", "clear_already_zero", "out_of_range", "clear_out_of_range"])
def test_apply_is_all_or_nothing(bad: str) -> None:
    bf = BloomFilter(G)
    bf.add_batch(KEYS[:20])
    set_bits = bf.set_positions()
    free = np.setdiff1d(np.arange(2000, dtype=np.uint64), set_bits)
    good_set, good_clear = free[:5], set_bits[:5]
    if bad == "set_already_one":
        change = ChangeSet.of(np.append(good_set, set_bits[-1]), good_clear)
    elif bad == "clear_already_zero":
        change = ChangeSet.of(good_set, np.append(good_clear, free[-1]))
    elif bad == "out_of_range":
        change = ChangeSet.of(np.append(good_set, G.bits), good_clear)
    else:
        change = ChangeSet.of(good_set, np.append(good_clear, G.bits + 5))
    snapshot, checksum_before = bf.to_bytes(), bf.checksum
    with pytest.raises(FilterDivergedError):
        bf.apply(change)
    assert bf.to_bytes() == snapshot and bf.checksum == checksum_before


def test_apply_rejects_a_change_applied_twice() -> None:
    bf = BloomFilter(G)
    change = ChangeSet.of([1, 2, 3])
    bf.apply(change)
    with pytest.raises(FilterDivergedError, match="already 1"):
        bf.apply(change)


def test_bytes_round_trip_and_errors() -> None:
    bf = BloomFilter(G)
    bf.add_batch(KEYS)
    back = BloomFilter.from_bytes(G, bf.to_bytes())
    assert back == bf and back.checksum == bf.checksum
    with pytest.raises(ValueError, match="length 8191"):
        BloomFilter.from_bytes(G, bf.to_bytes()[:-1])
    odd = Geometry(1029, 2)                         # 5 padding bits in the last byte
    with pytest.raises(ValueError, match="padding bits"):
        BloomFilter.from_bytes(odd, bytes(128) + b"\x80")
    assert BloomFilter.from_bytes(odd, bytes(128) + b"\x1f").set_count() == 5


def test_construction_errors() -> None:
    with pytest.raises(GeometryError):
        BloomFilter(Geometry(10, 3))
    with pytest.raises(ValueError, match="length 5"):
        BloomFilter(G, bitarray(5))
    big_endian = bitarray(G.bits, endian="big")
    big_endian.setall(0)
    big_endian[3] = 1
    assert BloomFilter(G, big_endian).set_positions().tolist() == [3]


def test_copy_is_independent_and_equality() -> None:
    bf = BloomFilter(G)
    bf.add(b"x")
    clone = bf.copy()
    clone.add(b"y")
    assert clone != bf and bf.contains(b"x") and clone.contains(b"y")
    assert BloomFilter(G) != BloomFilter(Geometry(1 << 16, 5, seed=4))
    assert np.array_equal(np.sort(key_positions(b"x", G)), _unique(bf.set_positions()))


def test_pad_bits_of_the_buffer_never_show() -> None:
    g = Geometry(1029, 2)
    raw = bitarray(1032, endian="little")
    raw.setall(1)
    del raw[1029:]                     # the buffer may keep the three pad bits set
    bf = BloomFilter(g, raw)
    assert int(bf.set_positions().max()) == 1028
    assert bf.set_positions().size == 1029
    assert bf.to_bytes()[-1] == 0b00011111
    assert bf.contains(b"anything")    # a full filter says "maybe" to every key


def test_apply_rejects_repeated_positions_and_accepts_unsorted() -> None:
    bf = BloomFilter(G)
    with pytest.raises(FilterDivergedError, match="appears twice"):
        bf.apply(ChangeSet(np.array([7, 5, 7], dtype=np.uint64), np.zeros(0, dtype=np.uint64)))
    assert bf.set_count() == 0
    bf.apply(ChangeSet(np.array([9, 3, 8], dtype=np.uint64), np.zeros(0, dtype=np.uint64)))
    assert bf.set_positions().tolist() == [3, 8, 9]
    assert bf.checksum == checksum.xor_of([3, 8, 9])
