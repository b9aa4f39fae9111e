"""Bit-sliced routing index: which nodes' filters have all k bits of a key set.

Nodes whose filters share a geometry form a group. A group stores, for every bit position
of the geometry, one row marking the nodes that have that bit set (a bit-sliced signature
file, Faloutsos & Christodoulakis, "Signature files", ACM TOIS 1984). Finding the candidates
of a key ANDs the k rows at its positions, so the cost grows with k and the row width, not
with one membership test per node.

Row width fits the group size so memory per node stays about m/8 bytes: uint8 rows for up
to 8 nodes, uint16, uint32, uint64, then several uint64 words per row.

Pure data structure: no I/O, no clocks. One lock makes every mutation atomic with respect to
lookups (a lookup never sees a half-installed column).
"""

from __future__ import annotations

import threading
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
import numpy.typing as npt

from shardsieve.bloom import FilterDivergedError
from shardsieve.geometry import Geometry

_WIDTH_CLASSES: tuple[tuple[int, type[np.unsignedinteger]], ...] = (
    (8, np.uint8), (16, np.uint16), (32, np.uint32), (64, np.uint64))

PositionsFn = Callable[[Sequence[bytes], Geometry], npt.NDArray[np.uint64]]


class RoutingIndexError(ValueError):
    """Bad input to the index (wrong column length, position out of range); nothing changed."""


def _layout(slots: int) -> tuple[np.dtype, int, int]:
    """(dtype, words per row, slot capacity) for a group that must hold `slots` nodes."""
    for cap, dtype in _WIDTH_CLASSES:
        if slots <= cap:
            return np.dtype(dtype), 1, cap
    words = -(-slots // 64)
    return np.dtype(np.uint64), words, words * 64


def unpack_le(data: bytes, bits: int) -> npt.NDArray[np.uint8]:
    """Little-endian bit order bytes (bit i is bit i%8 of byte i//8) -> one 0/1 byte per bit."""
    need = (bits + 7) // 8
    if len(data) != need:
        raise RoutingIndexError(f"column has {len(data)} bytes, geometry of {bits} bits needs {need}")
    return np.unpackbits(np.frombuffer(data, dtype=np.uint8), bitorder="little")[:bits]


@dataclass
class Candidates:
    """Candidates of a batch in compressed form: for key i, nodes[offsets[i]:offsets[i+1]]."""

    offsets: npt.NDArray[np.int64]
    nodes: list[str]

    def for_key(self, i: int) -> list[str]:
        return self.nodes[int(self.offsets[i]):int(self.offsets[i + 1])]

    def lists(self) -> list[list[str]]:
        o = self.offsets.tolist()
        return [self.nodes[o[i]:o[i + 1]] for i in range(len(o) - 1)]

    @property
    def total(self) -> int:
        return len(self.nodes)


class _Group:
    """One geometry's bit-sliced rows plus the slot <-> node id maps."""

    def __init__(self, geometry: Geometry) -> None:
        self.geometry = geometry
        self.dtype, self.words, self.capacity = _layout(1)
        self.rows = np.zeros((geometry.bits, self.words), dtype=self.dtype)
        self.slot_of: dict[str, int] = {}
        self.node_at: list[str | None] = [None] * self.capacity
        self.bits_per_word = self.dtype.itemsize * 8
        self._names: npt.NDArray[np.object_] | None = None

    def names(self) -> npt.NDArray[np.object_]:
        """Node id per slot as an object array (cached; slots change rarely)."""
        if self._names is None:
            self._names = np.array(self.node_at, dtype=object)
        return self._names

    # -- slots -------------------------------------------------------------------------------
    def _grow(self) -> None:
        dtype, words, capacity = _layout(self.capacity + 1)
        if words == 1:
            rows = self.rows.astype(dtype)
        else:
            rows = np.zeros((self.geometry.bits, words), dtype=dtype)
            rows[:, :self.words] = self.rows.astype(dtype)
        self.rows, self.dtype, self.words, self.capacity = rows, dtype, words, capacity
        self.bits_per_word = dtype.itemsize * 8
        self.node_at.extend([None] * (capacity - len(self.node_at)))

    def slot_for(self, node_id: str) -> int:
        slot = self.slot_of.get(node_id)
        if slot is not None:
            return slot
        try:
            slot = self.node_at.index(None)
        except ValueError:
            self._grow()
            slot = self.node_at.index(None)
        self.node_at[slot] = node_id
        self.slot_of[node_id] = slot
        self._names = None
        return slot

    def _word_mask(self, slot: int) -> tuple[int, np.unsignedinteger]:
        word, bit = divmod(slot, self.bits_per_word)
        return word, self.dtype.type(1 << bit)

    # -- column edits ------------------------------------------------------------------------
    def set_column(self, slot: int, column: npt.NDArray[np.uint8]) -> None:
        word, mask = self._word_mask(slot)
        bit = slot % self.bits_per_word
        col = self.rows[:, word]
        col &= ~mask
        col |= column.astype(self.dtype) << self.dtype.type(bit)

    def clear_column(self, slot: int) -> None:
        word, mask = self._word_mask(slot)
        self.rows[:, word] &= ~mask

    def free(self, node_id: str) -> None:
        slot = self.slot_of.pop(node_id)
        self.clear_column(slot)
        self.node_at[slot] = None
        self._names = None

    def apply(self, slot: int, set_positions: npt.NDArray[np.uint64],
              cleared_positions: npt.NDArray[np.uint64]) -> None:
        word, mask = self._word_mask(slot)
        if set_positions.size:
            self.rows[set_positions, word] |= mask
        if cleared_positions.size:
            self.rows[cleared_positions, word] &= ~mask

    def column(self, slot: int) -> npt.NDArray[np.uint8]:
        word, _ = self._word_mask(slot)
        bit = slot % self.bits_per_word
        return ((self.rows[:, word] >> self.dtype.type(bit)) & self.dtype.type(1)).astype(np.uint8)

    # -- lookups -----------------------------------------------------------------------------
    def match(self, positions: npt.NDArray[np.uint64]) -> npt.NDArray[np.unsignedinteger]:
        """AND of the k rows per key: (n, words) words whose set bits are candidate slots."""
        cols = np.ascontiguousarray(positions.T).astype(np.intp, copy=False)   # (k, n), one gather per hash
        if self.words == 1:
            rows = self.rows.reshape(-1)
            acc = np.take(rows, cols[0])
            for j in range(1, cols.shape[0]):
                acc &= np.take(rows, cols[j])
            return acc.reshape(-1, 1)
        acc = np.take(self.rows, cols[0], axis=0)
        for j in range(1, cols.shape[0]):
            acc &= np.take(self.rows, cols[j], axis=0)
        return acc

    def decode(self, acc: npt.NDArray[np.unsignedinteger]) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.intp]]:
        """(key index, slot) pairs of every set bit in the AND results, sorted by key.

        Most non-zero words hold exactly one bit (one candidate): its index is log2 of the word,
        exact in float64 for every power of two below 2^64. Words with several bits are unpacked.
        """
        keys, words = np.nonzero(acc)
        if keys.size == 0:
            return keys, words
        values = acc[keys, words]
        bpw = self.bits_per_word
        single = (values & (values - self.dtype.type(1))) == 0
        if single.all():
            return keys, words * bpw + np.log2(values.astype(np.float64)).astype(np.intp)
        multi = np.flatnonzero(~single)
        one = np.flatnonzero(single)
        mv = values[multi]
        bits = np.unpackbits(mv.view(np.uint8).reshape(mv.size, self.dtype.itemsize), axis=1, bitorder="little")
        which, bit = np.nonzero(bits)
        all_keys = np.concatenate([keys[one], keys[multi][which]])
        all_slots = np.concatenate([words[one] * bpw + np.log2(values[one].astype(np.float64)).astype(np.intp),
                                    words[multi][which] * bpw + bit])
        order = np.argsort(all_keys, kind="stable")
        return all_keys[order], all_slots[order]

    @property
    def nbytes(self) -> int:
        return int(self.rows.nbytes)


class RoutingIndex:
    """Bit-sliced replicas of every node's filter, grouped by geometry; thread-safe."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._groups: dict[Geometry, _Group] = {}
        self._geometry_of: dict[str, Geometry] = {}

    # -- mutations ---------------------------------------------------------------------------
    def install(self, node_id: str, geometry: Geometry, column: bytes | npt.NDArray[np.uint8]) -> None:
        """Replace node_id's whole filter (little-endian bit order bytes, or 0/1 per bit).

        The node may move to another geometry group; lookups see either the old filter or
        the new one, never a mix.
        """
        bits = unpack_le(column, geometry.bits) if isinstance(column, (bytes, bytearray, memoryview)) \
            else np.asarray(column, dtype=np.uint8)
        if bits.shape != (geometry.bits,):
            raise RoutingIndexError(f"column for node {node_id!r} has shape {bits.shape}, geometry needs ({geometry.bits},)")
        with self._lock:
            old = self._geometry_of.get(node_id)
            if old is not None and old != geometry:
                self._release(node_id, old)
            group = self._groups.get(geometry)
            if group is None:
                group = self._groups[geometry] = _Group(geometry)
            slot = group.slot_for(node_id)
            group.set_column(slot, bits)
            self._geometry_of[node_id] = geometry

    def apply(self, node_id: str, set_positions: npt.ArrayLike, cleared_positions: npt.ArrayLike = (),
              *, strict: bool = True) -> None:
        """Flip bits of node_id's column in place (a decoded delta).

        strict: a bit to set must be 0 and a bit to clear must be 1, else FilterDivergedError
        and nothing changes (the replica diverged from the node; it needs a snapshot).
        """
        s = np.asarray(set_positions, dtype=np.uint64).ravel()
        c = np.asarray(cleared_positions, dtype=np.uint64).ravel()
        with self._lock:
            geometry = self._geometry_of.get(node_id)
            if geometry is None:
                raise RoutingIndexError(f"node {node_id!r} has no filter in the index; install a snapshot first")
            m = geometry.bits
            for name, arr in (("set", s), ("cleared", c)):
                if arr.size and int(arr.max()) >= m:
                    raise RoutingIndexError(f"{name} position {int(arr.max())} is outside the filter of {m} bits")
            group = self._groups[geometry]
            slot = group.slot_of[node_id]
            if strict:
                word, mask = group._word_mask(slot)
                if s.size and np.any(group.rows[s, word] & mask):
                    raise FilterDivergedError(f"delta sets a bit of node {node_id!r} that is already 1")
                if c.size and not np.all(group.rows[c, word] & mask):
                    raise FilterDivergedError(f"delta clears a bit of node {node_id!r} that is already 0")
            group.apply(slot, s, c)

    def remove(self, node_id: str) -> bool:
        """Drop node_id's filter and free its slot; False if it had none."""
        with self._lock:
            geometry = self._geometry_of.get(node_id)
            if geometry is None:
                return False
            self._release(node_id, geometry)
            return True

    def _release(self, node_id: str, geometry: Geometry) -> None:
        group = self._groups[geometry]
        group.free(node_id)
        del self._geometry_of[node_id]
        if not group.slot_of:
            del self._groups[geometry]

    # -- lookups -----------------------------------------------------------------------------
    def geometries(self) -> list[Geometry]:
        with self._lock:
            return list(self._groups)

    def locate(self, keys: Sequence[bytes], positions: PositionsFn) -> Candidates:
        """Candidates per key: hash the batch once per geometry, AND k rows per key per group.

        Hashing runs outside the lock; a group that appeared meanwhile is hashed under it, so
        a node moving between groups is never missed.
        """
        hashed = {geo: positions(keys, geo) for geo in self.geometries()} if keys else {}
        return self.locate_hashed(keys, hashed, positions)

    def locate_hashed(self, keys: Sequence[bytes], hashed: dict[Geometry, npt.NDArray[np.uint64]],
                      positions: PositionsFn) -> Candidates:
        """Like locate, with positions already computed per geometry (reused across calls)."""
        n = len(keys)
        key_parts: list[npt.NDArray[np.intp]] = []
        name_parts: list[npt.NDArray[np.object_]] = []
        if n:
            with self._lock:
                for geo, group in self._groups.items():
                    pos = hashed.get(geo)
                    if pos is None:
                        pos = hashed[geo] = positions(keys, geo)
                    found_keys, slots = group.decode(group.match(pos))
                    if found_keys.size:
                        key_parts.append(found_keys)
                        name_parts.append(group.names()[slots])
        if not key_parts:
            return Candidates(np.zeros(n + 1, dtype=np.int64), [])
        found = np.concatenate(key_parts)
        names = np.concatenate(name_parts)
        if len(key_parts) > 1:
            order = np.argsort(found, kind="stable")
            found, names = found[order], names[order]
        offsets = np.zeros(n + 1, dtype=np.int64)
        np.cumsum(np.bincount(found, minlength=n), out=offsets[1:])
        return Candidates(offsets, names.tolist())

    def contains(self, node_id: str, positions_row: npt.ArrayLike) -> bool:
        """Whether all given positions are set in node_id's column (tests, diagnostics)."""
        with self._lock:
            geometry = self._geometry_of.get(node_id)
            if geometry is None:
                return False
            group = self._groups[geometry]
            word, mask = group._word_mask(group.slot_of[node_id])
            pos = np.asarray(positions_row, dtype=np.uint64)
            return bool(np.all(group.rows[pos, word] & mask))

    # -- introspection -----------------------------------------------------------------------
    def geometry_of(self, node_id: str) -> Geometry | None:
        with self._lock:
            return self._geometry_of.get(node_id)

    def column(self, node_id: str) -> npt.NDArray[np.uint8]:
        """node_id's filter as 0/1 per bit (a copy)."""
        with self._lock:
            geometry = self._geometry_of[node_id]
            group = self._groups[geometry]
            return group.column(group.slot_of[node_id])

    def popcount(self, node_id: str) -> int:
        return int(self.column(node_id).sum())

    def nodes(self) -> list[str]:
        with self._lock:
            return list(self._geometry_of)

    def memory_bytes(self) -> int:
        with self._lock:
            return sum(g.nbytes for g in self._groups.values())

    def group_sizes(self) -> dict[Geometry, int]:
        with self._lock:
            return {geo: len(g.slot_of) for geo, g in self._groups.items()}
