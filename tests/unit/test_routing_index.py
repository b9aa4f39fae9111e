"""The bit-sliced routing index against per-node Bloom filter membership.

Reference for every expected candidate list: the Bloom filter membership rule (a key may be
in the set iff all k of its bits are set; Bloom, CACM 1970), evaluated node by node with
shardsieve.bloom.BloomFilter.contains_batch, which shares no code with the index. Memory is
held against m/8 bytes per filter (one bit per position; common practice) and the bounds the
index states in its module docstring.
"""

from __future__ import annotations

import mmap
import threading
import tracemalloc
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

from shardsieve.coordinator import routing_index
from shardsieve.coordinator.routing_index import LOOKUP_HOLD_KEYS, RoutingIndex, RoutingIndexError, decode
from shardsieve.bloom import BloomFilter, FilterDivergedError
from shardsieve.geometry import Geometry
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


def _bloom(keys: list[bytes], geometry: Geometry = GEO) -> BloomFilter:
    bf = BloomFilter(geometry)
    bf.add_batch(keys)
    return bf


def _reference(filters: dict[str, BloomFilter], keys: list[bytes]) -> list[set[str]]:
    hits = {nid: bf.contains_batch(keys) for nid, bf in filters.items()}
    return [{nid for nid in filters if hits[nid][i]} for i in range(len(keys))]


@pytest.mark.parametrize("n_nodes", [1, 3, 7, 8, 9, 15, 16, 17, 33, 63, 64, 65, 130])
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


def test_remove_refills_the_slot_and_drops_empty_group() -> None:
    filters = _fleet(9, 10)  # 9 nodes: one byte of slots (8 nodes) and one packed copy
    index = RoutingIndex()
    for nid, bf in filters.items():
        index.install(nid, bf.geometry, bf.to_bytes())
    assert index.slice_widths() == {GEO: 1}
    assert index.memory_bytes() == 9 * GEO.byte_size
    assert index.remove("node-4") and not index.remove("node-4")
    probe = _keys("n4", 10) + _keys("n8", 10)
    del filters["node-4"]
    assert [set(c) for c in index.locate(probe, positions).lists()] == _reference(filters, probe)
    # The packed node moved into the freed slot: 8 nodes, one full byte of slots, no copy left.
    assert index.memory_bytes() == 8 * GEO.byte_size
    index.install("node-new", GEO, _bloom(_keys("n4", 10)).to_bytes())
    filters["node-new"] = _bloom(_keys("n4", 10))
    assert [set(c) for c in index.locate(probe, positions).lists()] == _reference(filters, probe)
    for nid in list(index.nodes()):
        index.remove(nid)
    assert index.memory_bytes() == 0 and index.group_sizes() == {}


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
                                         (np.uint8, 3), (np.uint64, 2), (np.uint64, 3), (np.uint64, 4), (np.uint64, 5)])
def test_decode_matches_a_bit_by_bit_reading(dtype: type, words: int) -> None:
    """decode() turns AND results into (key, slot) pairs; reference: reading every bit one by one
    (slot = word * bits-per-word + bit, little-endian bit order within a word; common practice)."""
    rng = np.random.default_rng(words * 131 + np.dtype(dtype).itemsize)
    bits_per_word = np.dtype(dtype).itemsize * 8
    top = np.iinfo(dtype).max
    acc = rng.integers(0, top, size=(300, words), dtype=dtype, endpoint=True)
    acc[rng.random((300, words)) < 0.6] = 0                          # most words empty
    single = rng.random((300, words)) < 0.3                          # many words with one candidate
    acc[single] = (np.uint64(1) << rng.integers(0, bits_per_word, size=int(single.sum())).astype(np.uint64)
                   ).astype(dtype)
    acc[0] = top                                                     # every slot of a key
    acc[1, words - 1] = top ^ (top >> 1)                             # only the highest bit
    keys, slots = decode(acc, bits_per_word)
    expected = [(i, w * bits_per_word + b) for i in range(300) for w in range(words)
                for b in range(bits_per_word) if (int(acc[i, w]) >> b) & 1]
    assert list(zip(keys.tolist(), slots.tolist())) == expected
    empty_keys, empty_slots = decode(np.zeros((4, words), dtype=dtype), bits_per_word)
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


@pytest.mark.parametrize("n_nodes", [8, 9, 70, 200])
def test_rows_start_on_a_cache_line(n_nodes: int) -> None:
    """Rows of 2^j <= 64 bytes never straddle two 64-byte lines once the array starts on one
    (64-byte lines: Intel 64 and IA-32 Optimization Reference Manual; common practice)."""
    index = RoutingIndex()
    for nid, bf in _fleet(n_nodes, 5).items():
        index.install(nid, bf.geometry, bf.to_bytes())
    rows = index._groups[GEO].slice.rows
    assert rows is not None and rows.ctypes.data % 64 == 0
    assert rows.flags["C_CONTIGUOUS"] and rows.shape == (GEO.bits, n_nodes // 8)


# ----------------------------------------------------------------------------- memory bounds

# The bound the index must keep (its task): 1.10 x m/8 per node plus a fixed overhead per node,
# which the module states (MEMORY_OVERHEAD_PER_NODE: page rounding of a slice's map).
RATIO_BOUND = 1.10


def _memory_bound(index: RoutingIndex) -> float:
    sizes = index.group_sizes()
    filters = sum(n * geo.byte_size for geo, n in sizes.items())
    return RATIO_BOUND * filters + routing_index.MEMORY_OVERHEAD_PER_NODE * sum(sizes.values())


def _random_column(rng: np.random.Generator, geometry: Geometry, fill: float = 0.4) -> bytes:
    return np.packbits(rng.random(geometry.bits) < fill, bitorder="little").tobytes()


def test_memory_stays_within_the_bound_through_joins_and_leaves() -> None:
    """Every group size from 1 to 140 on the way up, then random leaves down to none, with a
    second geometry alongside; candidates checked against per-node membership on the way."""
    rng = np.random.default_rng(5)
    index = RoutingIndex(workers=1)
    columns: dict[str, tuple[Geometry, bytes]] = {}
    probe = _keys("probe", 64)
    widths_seen = set()

    def check() -> None:
        assert index.memory_bytes() <= _memory_bound(index)
        filters = {nid: BloomFilter.from_bytes(geo, col) for nid, (geo, col) in columns.items()}
        if len(columns) % 9 == 0:   # membership every few steps (it is the slow part)
            assert [set(c) for c in index.locate(probe, positions).lists()] == _reference(filters, probe)
        widths_seen.update(index.slice_widths().values())

    for i in range(140):
        geo = GEO_BIG if i % 10 == 9 else GEO
        columns[f"node-{i}"] = (geo, _random_column(rng, geo, 0.1))
        index.install(f"node-{i}", geo, columns[f"node-{i}"][1])
        check()
    for nid in rng.permutation(sorted(columns)).tolist():
        assert index.remove(nid)
        del columns[nid]
        check()
    assert index.memory_bytes() == 0 and index.nodes() == []
    assert max(widths_seen) == 126 // 8 and 0 in widths_seen   # the slice grew and shrank


def test_bookkeeping_per_node_stays_within_the_stated_overhead() -> None:
    """Everything the index allocates (traced by tracemalloc, plus its slice maps, which are not
    traced) for 300 small filters stays within the stated bound: (1 + 1/16) m/8 a node plus the
    stated overheads (page rounding and bookkeeping)."""
    geos = [Geometry(bits=1024, hashes=3), Geometry(bits=2048, hashes=4, seed=9)]
    rng = np.random.default_rng(8)
    cols = [(f"node-{i:04d}", geos[i % 2], _random_column(rng, geos[i % 2])) for i in range(300)]
    index = RoutingIndex(workers=1)
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        for nid, geo, col in cols:
            index.install(nid, geo, col)
        traced = tracemalloc.get_traced_memory()[0] - before
    finally:
        tracemalloc.stop()
    mapped = sum(-(-geo.bits * w // mmap.PAGESIZE) * mmap.PAGESIZE for geo, w in index.slice_widths().items())
    filters = sum(geo.byte_size for _, geo, _ in cols)
    per_node = routing_index.MEMORY_OVERHEAD_PER_NODE + routing_index.BOOKKEEPING_PER_NODE
    assert traced + mapped <= (1 + 1 / routing_index.SLACK_DIVISOR) * filters + per_node * len(cols)


# ----------------------------------------------------------------------------- installs

def test_install_takes_packed_bytes_or_bits_and_rejects_misfits() -> None:
    bf = _bloom(_keys("forms", 50))
    raw = bf.to_bytes()
    bits = np.unpackbits(np.frombuffer(raw, dtype=np.uint8), bitorder="little")
    index = RoutingIndex()
    for form in (raw, bytearray(raw), memoryview(raw), np.frombuffer(raw, dtype=np.uint8), bits, bits.astype(bool)):
        index.install("node-f", GEO, form)
        assert index.packed("node-f") == raw
        assert index.popcount("node-f") == bf.set_count()   # bitarray's count (reference library)
    odd = Geometry(bits=1028, hashes=3)                        # 4 padding bits in the last byte
    padded = bytearray(odd.byte_size)
    padded[-1] = 0x10                                          # bit 1028: beyond the filter
    with pytest.raises(RoutingIndexError, match="padding"):
        index.install("node-f", odd, bytes(padded))
    with pytest.raises(RoutingIndexError, match="shape"):
        index.install("node-f", GEO, np.zeros(GEO.bits + 1, dtype=np.uint8))
    assert index.packed("node-f") == raw and index.geometry_of("node-f") == GEO


def test_popcount_is_kept_through_installs_moves_and_deltas() -> None:
    """Set bits per node kept incrementally; reference: bitarray's count of the same filter."""
    rng = np.random.default_rng(3)
    index = RoutingIndex(chunk_positions=512)
    filters = _fleet(17, 30)
    for nid, bf in filters.items():
        index.install(nid, bf.geometry, bf.to_bytes())
    for step in range(40):
        nid = f"node-{int(rng.integers(0, 17))}"
        bf = filters[nid]
        have = bf.set_positions()
        lacking = np.setdiff1d(np.arange(GEO.bits, dtype=np.uint64), have)
        s = rng.choice(lacking, size=5, replace=False)
        c = rng.choice(have, size=3, replace=False)
        if step % 3 == 0:   # not strict: repeats, and bits already in their target state
            index.apply(nid, np.concatenate([s, s[:2], have[:4]]), np.concatenate([c, c, lacking[:3]]), strict=False)
        else:
            index.apply(nid, s, c)
        bits = np.unpackbits(np.frombuffer(bf.to_bytes(), dtype=np.uint8), bitorder="little")
        bits[s.astype(np.int64)] = 1
        bits[c.astype(np.int64)] = 0
        filters[nid] = BloomFilter.from_bytes(GEO, np.packbits(bits, bitorder="little").tobytes())
        if step % 7 == 0:   # a leave makes another node move into the freed slot
            gone = f"node-{int(rng.integers(0, 17))}"
            if gone != nid and gone in filters:
                index.remove(gone)
                del filters[gone]
                index.install(gone, GEO, _bloom(_keys(gone, 10)).to_bytes())
                filters[gone] = _bloom(_keys(gone, 10))
        for other, ref in filters.items():
            assert index.popcount(other) == ref.set_count()
            assert index.packed(other) == ref.to_bytes()


GEO_LARGE = Geometry(bits=1 << 16, hashes=4)


def _answers(index: RoutingIndex, probe: list[bytes], node_id: str) -> list[bool]:
    return [node_id in c for c in index.locate(probe, positions).lists()]


def test_install_in_chunks_shows_the_old_or_the_new_filter_at_every_chunk() -> None:
    """A node in a slot gets a new filter with settle=False, then the move into its slot runs
    one chunk at a time with lookups and a delta in between: from the moment install returns,
    the node answers exactly as its new filter, and other nodes as before."""
    filters = _fleet(9, 200, GEO_LARGE)
    index = RoutingIndex(workers=1, chunk_positions=1024)
    for nid, bf in filters.items():
        index.install(nid, bf.geometry, bf.to_bytes())
    new = _bloom(_keys("fresh", 300), GEO_LARGE)
    probe = _keys("n3", 200) + _keys("fresh", 300) + _keys("absent", 500)
    others = {k: v for k, v in filters.items() if k != "node-3"}
    memory = index.memory_bytes()
    index.install("node-3", GEO_LARGE, new.to_bytes(), settle=False)
    assert index.memory_bytes() == memory + GEO_LARGE.byte_size   # the staged copy, nothing else
    expected = [set(c) for c in _reference({**others, "node-3": new}, probe)]
    chunks = 0
    delta_applied = False
    while not index.settle(max_chunks=1):
        chunks += 1
        assert [set(c) for c in index.locate(probe, positions).lists()] == expected
        if chunks == 20 and not delta_applied:   # mid-copy: the delta reaches both copies
            extra = _keys("late", 5)
            index.apply("node-3", np.setdiff1d(positions(extra, GEO_LARGE).ravel(), new.set_positions()))
            new.add_batch(extra)
            expected = [set(c) for c in _reference({**others, "node-3": new}, probe + extra)][:len(probe)]
            probe_late = extra
            delta_applied = True
    assert chunks >= GEO_LARGE.bits // 1024 - 1 and delta_applied
    assert index.packed("node-3") == new.to_bytes()
    assert all(_answers(index, probe_late, "node-3"))
    assert index.memory_bytes() == memory


def test_a_width_change_in_chunks_answers_like_the_reference() -> None:
    """The 16th node widens the slice from one byte to two while rows move a few at a time, and a
    leave narrows it back; lookups and deltas between chunks see every node's current filter."""
    rng = np.random.default_rng(11)
    index = RoutingIndex(workers=1, chunk_positions=4096, chunk_bytes=2048)
    filters = {f"node-{i}": _bloom(_keys(f"w{i}", 150), GEO_LARGE) for i in range(15)}
    for nid, bf in filters.items():
        index.install(nid, GEO_LARGE, bf.to_bytes())
    probe = [k for i in range(16) for k in _keys(f"w{i}", 20)] + _keys("absent", 300)

    def step_through(change: str) -> int:
        steps = 0
        while not index.settle(max_chunks=1):
            steps += 1
            assert [set(c) for c in index.locate(probe, positions).lists()] == _reference(filters, probe)
            nid = f"node-{int(rng.integers(0, 15))}"
            if steps % 5 == 0 and nid in filters:   # a delta between chunks, wherever the rows are
                extra = [f"{change}-{steps}".encode()]
                fresh = np.setdiff1d(positions(extra, GEO_LARGE).ravel(), filters[nid].set_positions())
                index.apply(nid, fresh)
                filters[nid].add_batch(extra)
        return steps

    filters["node-15"] = _bloom(_keys("w15", 150), GEO_LARGE)
    index.install("node-15", GEO_LARGE, filters["node-15"].to_bytes(), settle=False)
    assert step_through("widen") > GEO_LARGE.bits // 2048    # at least one chunk per 2048 rows moved
    assert index.slice_widths() == {GEO_LARGE: 2}
    assert index.memory_bytes() == 16 * GEO_LARGE.byte_size
    index.remove("node-2", settle=False)
    del filters["node-2"]
    assert step_through("narrow") > GEO_LARGE.bits // 2048
    assert index.slice_widths() == {GEO_LARGE: 1}
    assert index.memory_bytes() == 15 * GEO_LARGE.byte_size
    for nid, bf in filters.items():
        assert index.packed(nid) == bf.to_bytes()


def test_settle_runs_on_a_worker_thread() -> None:
    filters = _fleet(8, 20)
    index = RoutingIndex()
    for nid, bf in list(filters.items())[:7]:
        index.install(nid, bf.geometry, bf.to_bytes(), settle=False)
    index.install("node-7", GEO, filters["node-7"].to_bytes(), settle=False)
    probe = _keys("n7", 20) + _keys("absent", 100)
    assert [set(c) for c in index.locate(probe, positions).lists()] == _reference(filters, probe)
    assert index.slice_widths() == {GEO: 0}   # nothing moved yet: every node answers from its copy
    with ThreadPoolExecutor(1) as pool:
        assert pool.submit(index.settle).result() is True
    assert index.slice_widths() == {GEO: 1} and index.memory_bytes() == 8 * GEO.byte_size
    assert [set(c) for c in index.locate(probe, positions).lists()] == _reference(filters, probe)


class _TakeTurnsLock:
    """The index lock, but the installing thread may take it only after the looking-up thread
    finished a lookup since its last turn: every chunk of the install is followed by a lookup
    (real threads, interleaved by waiting on events, not by timing)."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.installer: threading.Thread | None = None
        self.lookup_done = threading.Event()

    def __enter__(self) -> None:
        if threading.current_thread() is self.installer:
            assert self.lookup_done.wait(timeout=60), "no lookup ran"
            self.lookup_done.clear()
        self._lock.acquire()

    def __exit__(self, *exc: object) -> None:
        self._lock.release()


def test_lookups_during_a_large_install_on_another_thread() -> None:
    """While another thread installs a new 2^22-bit filter for a node of a 9-node group, no
    lookup lists the node for a key both its old and new filters lack, and none drops it for a
    key both hold (Bloom 1970 membership of each filter is the reference)."""
    geo = Geometry(bits=1 << 22, hashes=4)
    rng = np.random.default_rng(2)
    lock = _TakeTurnsLock()
    index = RoutingIndex(workers=1, lock=lock)
    for i in range(9):
        index.install(f"node-{i}", geo, rng.integers(0, 256, size=geo.byte_size, dtype=np.uint8).tobytes())
    old, new = BloomFilter(geo), BloomFilter(geo)
    old.add_batch(_keys("both", 200) + _keys("old", 200))
    new.add_batch(_keys("both", 200) + _keys("new", 200))
    index.install("node-4", geo, old.to_bytes())
    steady = index.memory_bytes()
    candidates = _keys("both", 200) + _keys("old", 200) + _keys("new", 200) + _keys("none", 600)
    in_old, in_new = old.contains_batch(candidates), new.contains_batch(candidates)
    must = np.flatnonzero(in_old & in_new)
    never = np.flatnonzero(~in_old & ~in_new)
    assert must.size >= 200 and never.size > 500
    finished = threading.Event()

    def installer() -> None:
        try:
            index.install("node-4", geo, new.to_bytes())
        finally:
            finished.set()

    worker = threading.Thread(target=installer)
    lock.installer = worker
    worker.start()
    during = 0
    try:
        while not finished.is_set():
            in_flight = index.memory_bytes() > steady   # the new copy is staged, not yet in its slot
            # one lock hold per lookup: a larger batch lets the waiting installer in between its
            # holds, and this lock makes the installer wait for the lookup to end
            listed = np.array([answer for lo in range(0, len(candidates), LOOKUP_HOLD_KEYS)
                               for answer in _answers(index, candidates[lo:lo + LOOKUP_HOLD_KEYS], "node-4")])
            assert listed[must].all() and not listed[never].any()
            during += in_flight
            lock.lookup_done.set()
    finally:
        lock.lookup_done.set()
        worker.join()
    assert during >= geo.bits // routing_index.CHUNK_POSITIONS   # a lookup after every chunk
    assert index.packed("node-4") == new.to_bytes()


def test_install_allocation_on_a_2_26_bit_filter() -> None:
    """Installing a 2^26-bit filter (8 MiB packed) allocates its packed copy plus the stated
    scratch (traced by tracemalloc), whether it replaces a filter in a slot or joins as a packed
    copy. The join that completes a byte of slots also grows the map
    by m bytes (8 x m/8: the 8 copies it then frees); its peak is checked chunk by chunk."""
    geo = Geometry(bits=1 << 26, hashes=7)
    m8 = geo.byte_size
    rng = np.random.default_rng(4)
    index = RoutingIndex(workers=1)
    columns = [rng.integers(0, 256, size=m8, dtype=np.uint8).tobytes() for _ in range(10)]
    for i in range(8):
        index.install(f"node-{i}", geo, columns[i])
    replacement = BloomFilter(geo)
    replacement.add_batch(_keys("snapshot", 2000))
    raw = replacement.to_bytes()

    def traced_peak(action: object) -> int:
        tracemalloc.start()
        try:
            base = tracemalloc.get_traced_memory()[0]
            tracemalloc.reset_peak()
            action()   # type: ignore[operator]
            return tracemalloc.get_traced_memory()[1] - base
        finally:
            tracemalloc.stop()

    bound = m8 + routing_index.INSTALL_SCRATCH_BYTES                                 # 1.0625 x m/8
    assert traced_peak(lambda: index.install("node-3", geo, raw)) <= bound          # replaces a slot
    assert index.packed("node-3") == raw and index.memory_bytes() == 8 * m8
    assert traced_peak(lambda: index.install("node-8", geo, columns[8])) <= bound   # joins packed
    assert index.memory_bytes() == 9 * m8
    # Nodes 9..15 join; the 16th completes a byte: the resident peak, chunk by chunk.
    for i in range(9, 15):
        index.install(f"node-{i}", geo, columns[i % 10])
    steady = index.memory_bytes()
    index.install("node-15", geo, columns[5], settle=False)
    peak = index.memory_bytes()
    while not index.settle(max_chunks=1):
        peak = max(peak, index.memory_bytes())
    settled = index.memory_bytes()
    assert steady == 15 * m8 and settled == 16 * m8
    assert peak <= settled + 8 * m8   # the new byte of every row (m bytes) beside the 8 copies


class _CountingLock:
    """A plain lock that counts its holds."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.holds = 0

    def __enter__(self) -> None:
        self._lock.acquire()
        self.holds += 1

    def __exit__(self, *exc: object) -> None:
        self._lock.release()


def test_a_large_batch_takes_one_lock_hold_per_slice_and_answers_as_one() -> None:
    """A single-key lookup waits behind one slice of a large batch, not the whole batch; each
    key is still matched against every group within one hold, so the answers equal the
    per-node reference (Bloom 1970: inserted keys always test positive)."""
    filters = _fleet(9, 40)
    big = BloomFilter(GEO_BIG)
    big.add_batch(_keys("big", 40))
    filters["node-big"] = big
    lock = _CountingLock()
    index = RoutingIndex(workers=1, lock=lock)
    for nid, bf in filters.items():
        index.install(nid, bf.geometry, bf.to_bytes())
    probe = _keys("n0", 40) + _keys("big", 40) + _keys("absent", 3 * LOOKUP_HOLD_KEYS)
    before = lock.holds
    got = index.locate(probe, positions)
    # one hold to read the geometries before hashing, then one per slice
    assert lock.holds - before == 1 + -(-len(probe) // LOOKUP_HOLD_KEYS)
    assert [set(c) for c in got.lists()] == _reference(filters, probe)
