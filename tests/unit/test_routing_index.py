"""The bit-sliced routing index against per-node Bloom filter membership.

Reference for every expected candidate list: the Bloom filter membership rule (a key may be
in the set iff all k of its bits are set; Bloom, CACM 1970), evaluated node by node with
shardsieve.bloom.BloomFilter.contains_batch, which shares no code with the index.
"""

from __future__ import annotations

import threading

import numpy as np
import pytest

from shardsieve.coordinator.routing_index import RoutingIndex, RoutingIndexError
from shardsieve.bloom import BloomFilter, FilterDivergedError
from shardsieve.geometry import Geometry, geometry_for
from shardsieve.hashing import positions

GEO = Geometry(bits=1 << 12, hashes=5)
GEO_BIG = Geometry(bits=1 << 13, hashes=5)


def _keys(prefix: str, n: int) -> list[bytes]:
    return [f"{prefix}-{i}".encode() for i in range(n)]


def _fleet(n_nodes: int, keys_per_node: int, geometry: Geometry = GEO) -> dict[str, BloomFilter]:
    filters = {}
    for i in range(n_nodes):
        bf = BloomFilter(geometry)
        bf.add_batch(_keys(f"n{i}", keys_per_node))
        filters[f"node-{i}"] = bf
    return filters


def _reference(filters: dict[str, BloomFilter], keys: list[bytes]) -> list[set[str]]:
    hits = {nid: bf.contains_batch(keys) for nid, bf in filters.items()}
    return [{nid for nid in filters if hits[nid][i]} for i in range(len(keys))]


@pytest.mark.parametrize("n_nodes", [1, 3, 8, 9, 16, 17, 33, 64, 65, 130])
def test_locate_matches_per_node_membership(n_nodes: int) -> None:
    filters = _fleet(n_nodes, 40)
    index = RoutingIndex()
    for nid, bf in filters.items():
        index.install(nid, bf.geometry, bf.to_bytes())
    probe = _keys("n0", 40) + _keys(f"n{n_nodes - 1}", 40) + _keys("absent", 300)
    got = index.locate(probe, positions)
    assert [set(c) for c in got.lists()] == _reference(filters, probe)
    # No false negatives: each node's own keys list it (Bloom 1970: inserted keys always test positive).
    assert all("node-0" in got.for_key(i) for i in range(40))


def test_groups_by_geometry_and_moves_between_groups() -> None:
    filters = _fleet(4, 30)
    big = BloomFilter(GEO_BIG)
    big.add_batch(_keys("big", 30))
    filters["node-big"] = big
    index = RoutingIndex()
    for nid, bf in filters.items():
        index.install(nid, bf.geometry, bf.to_bytes())
    assert index.group_sizes() == {GEO: 4, GEO_BIG: 1}
    probe = _keys("big", 30) + _keys("n2", 30) + _keys("none", 200)
    assert [set(c) for c in index.locate(probe, positions).lists()] == _reference(filters, probe)

    # node-1 is rebuilt into the larger geometry: it leaves its old group atomically.
    moved = BloomFilter(GEO_BIG)
    moved.add_batch(_keys("n1", 30))
    index.install("node-1", GEO_BIG, moved.to_bytes())
    filters["node-1"] = moved
    assert index.group_sizes() == {GEO: 3, GEO_BIG: 2}
    probe = _keys("n1", 30) + _keys("none", 200)
    assert [set(c) for c in index.locate(probe, positions).lists()] == _reference(filters, probe)


def test_apply_delta_in_place_equals_new_filter() -> None:
    filters = _fleet(5, 20)
    index = RoutingIndex()
    for nid, bf in filters.items():
        index.install(nid, bf.geometry, bf.to_bytes())
    before = np.frombuffer(np.unpackbits(np.frombuffer(filters["node-2"].to_bytes(), np.uint8),
                                         bitorder="little").tobytes(), np.uint8)
    after_bf = BloomFilter(GEO)
    after_bf.add_batch(_keys("n2", 5) + _keys("extra", 25))   # some keys gone, some new
    after = np.unpackbits(np.frombuffer(after_bf.to_bytes(), np.uint8), bitorder="little")
    set_pos = np.nonzero((before == 0) & (after == 1))[0]
    cleared = np.nonzero((before == 1) & (after == 0))[0]
    assert set_pos.size and cleared.size
    index.apply("node-2", set_pos, cleared)
    filters["node-2"] = after_bf
    np.testing.assert_array_equal(index.column("node-2"), after)
    probe = _keys("extra", 25) + _keys("n2", 20) + _keys("none", 200)
    assert [set(c) for c in index.locate(probe, positions).lists()] == _reference(filters, probe)


def test_bad_input_changes_nothing() -> None:
    filters = _fleet(3, 20)
    index = RoutingIndex()
    for nid, bf in filters.items():
        index.install(nid, bf.geometry, bf.to_bytes())
    col = index.column("node-1").copy()
    with pytest.raises(RoutingIndexError, match="outside the filter"):
        index.apply("node-1", [1, 2, GEO.bits], [])
    with pytest.raises(RoutingIndexError, match="bytes"):
        index.install("node-1", GEO, b"\x00" * 10)
    already_set = int(np.nonzero(col)[0][0])
    already_clear = int(np.nonzero(col == 0)[0][0])
    with pytest.raises(FilterDivergedError, match="already 1"):
        index.apply("node-1", [already_clear, already_set], [])
    with pytest.raises(FilterDivergedError, match="already 0"):
        index.apply("node-1", [], [already_set, already_clear])
    with pytest.raises(RoutingIndexError, match="install a snapshot first"):
        index.apply("node-unknown", [1], [])
    np.testing.assert_array_equal(index.column("node-1"), col)


def test_remove_frees_slot_and_drops_empty_group() -> None:
    filters = _fleet(9, 10)  # 9 nodes: a uint16 group
    index = RoutingIndex()
    for nid, bf in filters.items():
        index.install(nid, bf.geometry, bf.to_bytes())
    assert index.remove("node-4") and not index.remove("node-4")
    probe = _keys("n4", 10)
    assert all("node-4" not in c for c in index.locate(probe, positions).lists())
    before = index.memory_bytes()
    index.install("node-new", GEO, filters["node-4"].to_bytes())   # reuses the freed slot
    assert index.memory_bytes() == before
    assert all("node-new" in c for c in index.locate(probe, positions).lists())
    for nid in list(index.nodes()):
        index.remove(nid)
    assert index.memory_bytes() == 0 and index.group_sizes() == {}


@pytest.mark.parametrize("n_nodes", [8, 16, 32, 64, 256])
def test_memory_is_m_over_8_per_node_at_full_width(n_nodes: int) -> None:
    # A filter of m bits needs m/8 bytes (one bit per position, common practice); a full row of
    # the bit-sliced layout holds exactly one bit per node per position.
    index = RoutingIndex()
    column = bytes(GEO.byte_size)
    for i in range(n_nodes):
        index.install(f"node-{i}", GEO, column)
    assert index.memory_bytes() == n_nodes * GEO.bits // 8


def test_install_is_atomic_for_concurrent_lookups() -> None:
    # Two filters that both hold "shared", in different geometries: whichever is installed, and
    # while the node moves between groups, "shared" must list the node.
    a, b = BloomFilter(GEO), BloomFilter(GEO_BIG)
    a.add_batch([b"shared"] + _keys("a", 200))
    b.add_batch([b"shared"] + _keys("b", 200))
    index = RoutingIndex()
    index.install("node-x", GEO, a.to_bytes())
    stop = threading.Event()

    def swapper() -> None:
        while not stop.is_set():
            index.install("node-x", GEO_BIG, b.to_bytes())
            index.install("node-x", GEO, a.to_bytes())

    t = threading.Thread(target=swapper)
    t.start()
    try:
        misses = sum("node-x" not in index.locate([b"shared"], positions).for_key(0) for _ in range(2000))
    finally:
        stop.set()
        t.join()
    assert misses == 0


@pytest.mark.parametrize("dtype,words", [(np.uint8, 1), (np.uint16, 1), (np.uint32, 1), (np.uint64, 1),
                                         (np.uint64, 2), (np.uint64, 3), (np.uint64, 4), (np.uint64, 5)])
def test_decode_matches_a_bit_by_bit_reading(dtype: type, words: int) -> None:
    """decode() turns AND results into (key, slot) pairs; reference: reading every bit one by one
    (slot = word * bits-per-word + bit, little-endian bit order within a word; common practice)."""
    from shardsieve.coordinator.routing_index import _Group

    rng = np.random.default_rng(words * 131 + np.dtype(dtype).itemsize)
    group = _Group(geometry_for(1000, 0.01))
    group.dtype, group.bits_per_word = np.dtype(dtype), np.dtype(dtype).itemsize * 8
    top = np.iinfo(dtype).max
    acc = rng.integers(0, top, size=(300, words), dtype=dtype, endpoint=True)
    acc[rng.random((300, words)) < 0.6] = 0                          # most words empty
    single = rng.random((300, words)) < 0.3                          # many words with one candidate
    acc[single] = (np.uint64(1) << rng.integers(0, group.bits_per_word, size=int(single.sum())).astype(np.uint64)
                   ).astype(dtype)
    acc[0] = top                                                     # every slot of a key
    acc[1, words - 1] = top ^ (top >> 1)                             # only the highest bit
    keys, slots = group.decode(acc)
    expected = [(i, w * group.bits_per_word + b) for i in range(300) for w in range(words)
                for b in range(group.bits_per_word) if (int(acc[i, w]) >> b) & 1]
    assert list(zip(keys.tolist(), slots.tolist())) == expected
    empty_keys, empty_slots = group.decode(np.zeros((4, words), dtype=dtype))
    assert empty_keys.size == 0 and empty_slots.size == 0


@pytest.mark.parametrize("workers", [2, 3])
def test_large_batches_split_across_threads_give_the_same_candidates(workers: int) -> None:
    """A batch above the threading threshold, over two geometry groups (one of 130 nodes: three
    64-bit words per row), gives exactly the per-node Bloom membership answer on any thread count."""
    filters = _fleet(130, 20)
    big = BloomFilter(GEO_BIG)
    big.add_batch(_keys("big", 20))
    filters["node-big"] = big
    serial, threaded = RoutingIndex(workers=1), RoutingIndex(workers=workers)
    for nid, bf in filters.items():
        serial.install(nid, bf.geometry, bf.to_bytes())
        threaded.install(nid, bf.geometry, bf.to_bytes())
    probe = _keys("n0", 20) + _keys("n129", 20) + _keys("big", 20) + _keys("absent", 20_000)
    got = threaded.locate(probe, positions)
    assert got.offsets.tolist() == serial.locate(probe, positions).offsets.tolist()
    assert [set(c) for c in got.lists()] == _reference(filters, probe)
    assert all("node-0" in got.for_key(i) for i in range(20))
    assert all("node-big" in got.for_key(40 + i) for i in range(20))


def test_worker_count_is_checked_and_can_change() -> None:
    with pytest.raises(RoutingIndexError, match="at least 1"):
        RoutingIndex(workers=-1)
    index = RoutingIndex(workers=2)
    with pytest.raises(RoutingIndexError, match="at least 1"):
        index.workers = 0
    assert index.workers == 2
    filters = _fleet(5, 30)
    for nid, bf in filters.items():
        index.install(nid, bf.geometry, bf.to_bytes())
    probe = _keys("absent", 17_000) + _keys("n4", 30)
    before = index.locate(probe, positions).lists()
    index.workers = 1
    assert index.locate(probe, positions).lists() == before == [sorted(s) for s in _reference(filters, probe)]
    assert RoutingIndex(workers=0).workers >= 1   # 0: one per core


@pytest.mark.parametrize("n_nodes", [1, 9, 70, 200])
def test_rows_start_on_a_cache_line(n_nodes: int) -> None:
    """Rows of 2^j <= 64 bytes never straddle two 64-byte lines once the array starts on one
    (64-byte lines: Intel 64 and IA-32 Optimization Reference Manual; common practice)."""
    index = RoutingIndex()
    for nid, bf in _fleet(n_nodes, 5).items():
        index.install(nid, bf.geometry, bf.to_bytes())
    group = index._groups[GEO]
    assert group.rows.ctypes.data % 64 == 0
    assert group.rows.flags["C_CONTIGUOUS"]
