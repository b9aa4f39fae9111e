"""Bit-sliced routing index: which nodes' filters have all k bits of a key set.

Nodes whose filters share a geometry form a group. Most of a group lives in its slice: for
every bit position of the geometry, one row of W bytes whose bit s marks the node in slot s
(a bit-sliced signature file, Faloutsos & Christodoulakis, "Signature files", ACM TOIS 1984).
Finding the candidates of a key ANDs the k rows at its positions, viewed as the widest
little-endian words W allows, so the cost grows with k and the row width, not with one
membership test per node.

Memory. Rows are byte-granular: a slice of W bytes holds 8W slots. The nodes left over keep a
packed copy of their filter instead: m/8 bytes in the snapshot's RAW format (bit p is bit
p mod 8 of byte p // 8), matched with k byte gathers per key. A group of N nodes keeps
N // 8 <= W <= 17N // 128, refilling free slots from packed copies first, so once settled at
most 7 nodes are packed, at most N/16 slots stand free, and the group holds

    max(8W, N) * m/8  <=  (1 + 1/16) * N * m/8 bytes of filter data,

plus a fixed overhead per node of at most MEMORY_OVERHEAD_PER_NODE = 512 bytes with 4 KiB
pages (the slice's map is rounded up to whole pages, shared by the >= 8 nodes of a group that
has a slice; counted by memory_bytes()) and at most BOOKKEEPING_PER_NODE = 512 bytes of Python bookkeeping
(slot tables, per-node records; not counted by memory_bytes()). This holds after any sequence
of joins and leaves: a leave that leaves more than N/16 slots free narrows the slice, moving
the nodes of the dropped bytes to free slots below or to packed copies first.

Installs. install() copies the packed bytes once (m/8 bytes) outside the lock; then, in one
short hold, that copy starts answering for the node and the node's old slot is masked out of
results, so a lookup sees the old filter or the new one, never a mix. The copy then moves into
a slot one chunk at a time: CHUNK_POSITIONS (65,536) positions of one column per lock hold,
deltas applied meanwhile going to both copies; the slot is unmasked and the copy freed in one
hold when the slot is whole. Beside the m/8 bytes an install allocates at most
INSTALL_SCRATCH_BYTES (512 KiB) of chunk scratch. The join that leaves 8 nodes without a slot
widens the slice: the map grows in place (mremap on Linux) by m bytes per byte of row width,
and rows move to their new place CHUNK_MOVE_BYTES (1 MiB) at a time, lookups reading each row
where it sits (through a byte-granular window: slower, only while rows move). Memory then
peaks m bytes (8 x m/8) above the size the group settles at, until the 8 packed copies have
moved into the new slots and are freed; after the move the rows' pages are gathered into
transparent huge pages where the system offers it. Narrowing moves rows the other way and
returns the freed pages CHUNK_RELEASE_BYTES (8 MiB) at a time.

Layout work runs in settle(), one chunk per hold of the lock; before each chunk it lets every
caller already waiting for the lock go first. install() and remove() settle before returning
by default; with settle=False the caller runs settle() itself, e.g. on a worker thread to keep
it off an event loop. Until then a staged copy answers, so only memory waits.

Pure data structure: no I/O, no clocks. A large batch is matched in slices on a small thread
pool of its own, under the lock (see RoutingIndex).
"""

from __future__ import annotations

import mmap
import os
import sys
import threading
from concurrent.futures import ThreadPoolExecutor
from contextlib import AbstractContextManager
from dataclasses import dataclass
from typing import Any, Callable, Iterator, Sequence

import numpy as np
import numpy.typing as npt
from numpy.lib.stride_tricks import as_strided

from shardsieve.bloom import FilterDivergedError
from shardsieve.geometry import Geometry

# One lock hold moves at most this many positions of one column (a join, a new filter, a slot
# change) or this many bytes of rows (a width change), or returns this many bytes of pages.
CHUNK_POSITIONS = 1 << 16
CHUNK_MOVE_BYTES = 1 << 20
CHUNK_RELEASE_BYTES = 8 << 20
# After rows moved, their pages are gathered into transparent huge pages one at a time (Linux
# madvise(2) MADV_COLLAPSE, since 6.1; 25 in <asm-generic/mman-common.h>; 2 MiB on x86-64).
HUGE_PAGE_BYTES = 2 << 20
_MADV_COLLAPSE = getattr(mmap, "MADV_COLLAPSE", 25 if sys.platform.startswith("linux") else None)

# A group of N nodes keeps at most N / SLACK_DIVISOR free slots in its slice once settled.
SLACK_DIVISOR = 16
PAGE_BYTES = mmap.PAGESIZE
# Fixed overhead per node on top of (1 + 1/SLACK_DIVISOR) * m/8: a slice's page rounding shared
# by its >= 8 nodes (counted by memory_bytes()), and Python bookkeeping (not counted there;
# about 230 bytes measured).
MEMORY_OVERHEAD_PER_NODE = PAGE_BYTES // 8
BOOKKEEPING_PER_NODE = 512
# An install allocates the new filter's packed copy (m/8 bytes) plus at most this much scratch.
INSTALL_SCRATCH_BYTES = 8 * CHUNK_POSITIONS

# match() works through a batch in chunks whose rows take about this many bytes (fits in L2).
_MATCH_CHUNK_BYTES = 256 * 1024
_MIN_MATCH_KEYS = 8192
# A batch of at least this many keys is matched in one slice per worker thread.
_PARALLEL_MIN_KEYS = 2 * _MIN_MATCH_KEYS
# A batch is matched this many keys per lock hold (about 2 ms at 1,000 nodes of 2^20 bits on the
# 2-core development machine, `shardsieve bench fleet`), so a single-key lookup waiting behind
# it waits for one hold, not the whole batch; a batch of _PARALLEL_MIN_KEYS or more keys is
# matched that many per hold, across the worker threads.
LOOKUP_HOLD_KEYS = 256
_COUNT_CHUNK_BYTES = 1 << 16   # packing and counting a new copy: bytes per step

PositionsFn = Callable[[Sequence[bytes], Geometry], npt.NDArray[np.uint64]]
Packed = npt.NDArray[np.uint8]


class RoutingIndexError(ValueError):
    """Bad input to the index (wrong column length, position out of range); nothing changed."""


def _word_dtype(width: int) -> np.dtype:
    """The widest little-endian word a row of `width` bytes divides into (slot s of a row is
    then bit s mod b of word s // b, b bits a word)."""
    for size in (8, 4, 2):
        if width % size == 0:
            return np.dtype(f"<u{size}")
    return np.dtype(np.uint8)


def _pages(size: int) -> int:
    return -(-size // PAGE_BYTES) * PAGE_BYTES


def _bit_index(powers: npt.NDArray[np.unsignedinteger]) -> npt.NDArray[np.intp]:
    """Bit index of words that each hold exactly one set bit: the float64 exponent field of the
    word (a power of two below 2^64 converts exactly; IEEE 754 binary64, bias 1023). Cheaper
    than np.log2."""
    return (powers.astype(np.float64).view(np.int64) >> 52) - 1023


def decode(acc: npt.NDArray[np.unsignedinteger], bits_per_word: int) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.intp]]:
    """(key index, slot) pairs of every set bit of (n, words) AND results, sorted by key, then slot.

    Works on the flat word array so the cost follows the number of non-zero words, not the
    row width: the key is the flat index divided by the words per row.
    """
    words = acc.shape[1]
    flat = acc.reshape(-1)
    idx = np.flatnonzero(flat != 0)   # via a bool mask: about twice as fast as on uint64 words
    values = flat[idx]
    if words == 1:
        keys, base = idx, None
    elif words & (words - 1) == 0:   # power of two: shift and mask instead of a division
        keys = idx >> (words.bit_length() - 1)
        base = (idx & (words - 1)) * bits_per_word
    else:
        keys, word = np.divmod(idx, words)
        base = word * bits_per_word
    one = values.dtype.type(1)
    first = _bit_index(values & ~(values - one))   # lowest set bit of every word
    slots = first if base is None else base + first
    counts = np.bitwise_count(values)
    multi = np.flatnonzero(counts > 1)
    if not multi.size:   # common case: one candidate per word
        return keys, slots
    # A few words hold several candidates. Their extra bits go right after their word's
    # lowest bit: every word moves right by the extra bits of the multi-bit words before
    # it (a step function built from the few multi-bit words, so no full-length cumsum).
    extra = counts[multi].astype(np.intp) - 1
    moved = np.zeros(multi.size + 1, dtype=np.intp)
    np.cumsum(extra, out=moved[1:])
    segments = np.diff(multi, prepend=-1, append=values.size - 1)
    dest = np.arange(values.size) + np.repeat(moved, segments)
    out_keys = np.empty(values.size + int(moved[-1]), dtype=np.intp)
    out_slots = np.empty_like(out_keys)
    out_keys[dest] = keys
    out_slots[dest] = slots
    at, rest = dest[multi], values[multi]
    r = 0
    while multi.size:   # peel the next lowest bit off each multi-bit word
        rest = rest & (rest - one)
        keep = rest != 0
        multi, rest, at = multi[keep], rest[keep], at[keep]
        r += 1
        bit = _bit_index(rest & ~(rest - one))
        out_keys[at + r] = keys[multi]
        out_slots[at + r] = bit if base is None else base[multi] + bit
    return out_keys, out_slots


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


# -- packed copies ------------------------------------------------------------------------------

def packed_copy(column: Any, geometry: Geometry, node_id: str = "") -> Packed:
    """An owned packed copy (m/8 bytes, little-endian bit order) of a column given as packed
    bytes (bytes, bytearray, memoryview, or a uint8 array of m/8 bytes) or as 0/1 per bit (an
    array of m values). RoutingIndexError when it does not fit the geometry."""
    m, size = geometry.bits, geometry.byte_size
    who = f" for node {node_id!r}" if node_id else ""
    if isinstance(column, (bytes, bytearray, memoryview)):
        src = np.frombuffer(column, dtype=np.uint8)
        if src.size != size:
            raise RoutingIndexError(f"column{who} has {src.size} bytes, a geometry of {m} bits needs {size}")
        packed = src.copy()
    else:
        arr = np.asarray(column)
        if arr.shape == (m,):   # 0/1 per bit: pack a chunk at a time (no m-byte temporary)
            packed = np.empty(size, dtype=np.uint8)
            for lo in range(0, m, 8 * _COUNT_CHUNK_BYTES):
                part = arr[lo:lo + 8 * _COUNT_CHUNK_BYTES]
                packed[lo // 8:(lo + part.size + 7) // 8] = np.packbits(part != 0, bitorder="little")
        elif arr.shape == (size,) and arr.dtype == np.uint8:
            packed = arr.copy()
        else:
            raise RoutingIndexError(f"column{who} has shape {arr.shape}; a geometry of {m} bits takes "
                                    f"{size} bytes (packed) or ({m},) values (one per bit)")
    if m % 8 and int(packed[-1]) >> (m % 8):
        raise RoutingIndexError(f"column{who} sets padding bits beyond bit {m - 1} in its last byte")
    return packed


def count_ones(packed: Packed) -> int:
    """Set bits of a packed copy, a chunk at a time."""
    return sum(int(np.bitwise_count(packed[lo:lo + _COUNT_CHUNK_BYTES]).sum(dtype=np.int64))
               for lo in range(0, packed.size, _COUNT_CHUNK_BYTES))


def _packed_read(packed: Packed, pos: npt.NDArray[np.intp]) -> npt.NDArray[np.uint8]:
    bits = packed[pos >> 3]
    bits >>= (pos & 7).astype(np.uint8)
    bits &= np.uint8(1)
    return bits


def _packed_write(packed: Packed, pos: npt.NDArray[np.intp], value: bool) -> None:
    masks = np.left_shift(np.uint8(1), (pos & 7).astype(np.uint8))
    if value:   # ufunc.at: several positions may share a byte
        np.bitwise_or.at(packed, pos >> 3, masks)
    else:
        np.bitwise_and.at(packed, pos >> 3, ~masks)


def _packed_hits(packed: Packed, byte: npt.NDArray[np.intp], shift: npt.NDArray[np.uint8]) -> npt.NDArray[np.intp]:
    """Keys (columns of the (k, n) byte / shift arrays) whose k bits are all set in packed."""
    acc = packed.take(byte[0])
    acc >>= shift[0]
    tmp = np.empty_like(acc)
    for j in range(1, byte.shape[0]):
        np.take(packed, byte[j], out=tmp, mode="wrap")
        tmp >>= shift[j]
        acc &= tmp
    acc &= np.uint8(1)
    return np.flatnonzero(acc)


def _column_bits(packed: Packed, lo: int, hi: int) -> npt.NDArray[np.uint8]:
    """0/1 per position lo..hi-1 of a packed copy (lo a multiple of 8)."""
    return np.unpackbits(packed[lo // 8:(hi + 7) // 8], bitorder="little", count=hi - lo)


# -- the slice ----------------------------------------------------------------------------------

@dataclass
class _WidthChange:
    """A width change under way: rows below `split` sit at stride `low`, rows from `split` up at
    stride `high` (low < high); the first `low` bytes of every row are valid."""

    split: int
    low: int
    high: int
    widening: bool


class _Slice:
    """One group's rows, `width` bytes each, on a private anonymous map: page aligned (so a row
    of 2^j <= 64 bytes never straddles two cache lines) and resized in place (mremap on Linux:
    growing by one byte a row costs m new bytes, not a second copy of the slice)."""

    def __init__(self, bits: int) -> None:
        self.bits = bits
        self.width = 0
        self.change: _WidthChange | None = None
        self._map: mmap.mmap | None = None
        self.flat: npt.NDArray[np.uint8] | None = None    # the whole map, byte by byte
        self.rows: npt.NDArray[np.uint8] | None = None    # (bits, width) while no change runs
        self.words: npt.NDArray[np.unsignedinteger] | None = None   # rows as words for the AND

    @property
    def nbytes(self) -> int:
        return _pages(len(self._map)) if self._map is not None else 0

    @property
    def live_width(self) -> int:
        """Bytes of every row that hold slots lookups may read now."""
        return self.width if self.change is None else self.change.low

    def _set_views(self) -> None:
        if self._map is not None and hasattr(mmap, "MADV_HUGEPAGE"):
            # Transparent huge pages where the system offers them on request (numpy asks the
            # same for its own large arrays): rows read at random positions then miss the TLB
            # far less often (Linux madvise(2), MADV_HUGEPAGE).
            try:
                self._map.madvise(mmap.MADV_HUGEPAGE)
            except OSError:
                pass
        self.flat = None if self._map is None else np.frombuffer(self._map, dtype=np.uint8)
        if self.flat is not None and self.width and self.change is None:
            self.rows = self.flat[:self.bits * self.width].reshape(self.bits, self.width)
            self.words = self.rows.view(_word_dtype(self.width))
        else:
            self.rows = self.words = None

    def _remap(self, size: int) -> mmap.mmap | None:
        """Resize the map to `size` bytes (0: drop it); returns a map that is no longer used."""
        self.flat = self.rows = self.words = None   # a map with exported buffers cannot resize
        old = self._map
        if size == 0:
            self._map = None
            return old
        if old is None:
            self._map = mmap.mmap(-1, size, flags=mmap.MAP_PRIVATE)
            self._set_views()
            return None
        try:
            old.resize(size)
            self._set_views()
            return None
        except (BufferError, OSError, SystemError, ValueError):
            # No mremap on this platform (or a view of the map is still alive somewhere): copy
            # into a new map instead, under the lock; the old one is returned to be released.
            new = mmap.mmap(-1, size, flags=mmap.MAP_PRIVATE)
            keep = min(size, len(old))
            np.frombuffer(new, dtype=np.uint8)[:keep] = np.frombuffer(old, dtype=np.uint8)[:keep]
            self._map = new
            self._set_views()
            return old

    def row_offsets(self, pos: npt.NDArray[np.intp]) -> npt.NDArray[np.intp]:
        ch = self.change
        if ch is None:
            return pos * self.width
        return np.where(pos < ch.split, pos * ch.low, pos * ch.high)

    # -- single bits (deltas, diagnostics) -----------------------------------------------------
    def read(self, pos: npt.NDArray[np.intp], slot: int) -> npt.NDArray[np.uint8]:
        assert self.flat is not None
        bits = self.flat[self.row_offsets(pos) + (slot >> 3)]
        bits >>= np.uint8(slot & 7)
        bits &= np.uint8(1)
        return bits

    def write(self, pos: npt.NDArray[np.intp], slot: int, value: bool) -> None:
        """Set or clear slot's bit at every position (one row each: repeats write the same byte)."""
        assert self.flat is not None
        off = self.row_offsets(pos) + (slot >> 3)
        bit = np.uint8(1 << (slot & 7))
        if value:
            self.flat[off] |= bit
        else:
            self.flat[off] &= ~bit

    # -- whole columns, a chunk at a time (no width change running) ---------------------------
    def column(self, lo: int, hi: int, slot: int) -> npt.NDArray[np.uint8]:
        assert self.rows is not None
        bits = self.rows[lo:hi, slot >> 3] >> np.uint8(slot & 7)
        bits &= np.uint8(1)
        return bits

    def set_column(self, lo: int, hi: int, slot: int, bits: npt.NDArray[np.uint8]) -> None:
        assert self.rows is not None
        col = self.rows[lo:hi, slot >> 3]
        shift = slot & 7
        col &= np.uint8(~(1 << shift) & 0xFF)
        col |= bits << np.uint8(shift)

    # -- width changes -------------------------------------------------------------------------
    def begin_resize(self, width: int) -> tuple[bool, mmap.mmap | None]:
        """Start changing every row to `width` bytes (the bytes dropped must hold no used slot):
        (done at once, a map to release). Otherwise rows move in move_step()."""
        w = self.width
        if width > w:
            self._remap(self.bits * width)
            if w == 0:   # nothing to move
                self.width = width
                self._set_views()
                return True, None
            self.change = _WidthChange(split=self.bits, low=w, high=width, widening=True)
        else:
            if width == 0:
                self.width = 0
                return True, self._remap(0)
            self.change = _WidthChange(split=0, low=width, high=w, widening=False)
        self._set_views()
        return False, None

    def move_step(self, budget: int) -> bool:
        """Move about `budget` bytes of rows to their new place; True when the change is complete.

        A widening moves rows from the top down, a narrowing from the bottom up, so a move never
        overwrites a row that has not moved yet (numpy buffers a chunk that overlaps itself)."""
        ch, flat = self.change, self.flat
        assert ch is not None and flat is not None
        n = max(1, budget // ch.high)
        if ch.widening:
            a, b = max(0, ch.split - n), ch.split
            src = flat[a * ch.low:b * ch.low].reshape(b - a, ch.low)
            dst = flat[a * ch.high:b * ch.high].reshape(b - a, ch.high)[:, :ch.low]
            np.copyto(dst, src)
            ch.split = a
            done = a == 0
        else:
            a, b = ch.split, min(self.bits, ch.split + n)
            src = flat[a * ch.high:b * ch.high].reshape(b - a, ch.high)[:, :ch.low]
            dst = flat[a * ch.low:b * ch.low].reshape(b - a, ch.low)
            np.copyto(dst, src)
            ch.split = b
            done = b == self.bits
        if done:
            self.width = ch.high if ch.widening else ch.low
            self.change = None
            self._set_views()
        return done

    def tail(self) -> tuple[int, int]:
        """Page-aligned byte range of the map beyond the rows (left by a narrowing)."""
        if self._map is None:
            return 0, 0
        return _pages(self.bits * self.width), len(self._map)

    def release(self, start: int, end: int) -> None:
        """Return the pages of [start, end) to the system (they read as zeros afterwards)."""
        assert self._map is not None
        if end > start and hasattr(self._map, "madvise"):
            self._map.madvise(mmap.MADV_DONTNEED, start, end - start)

    def collapse(self, start: int, end: int) -> bool:
        """Gather [start, end) into huge pages (pages touched while the map was small, or moved
        by mremap, stay 4 KiB otherwise: a random row read then misses the TLB more often;
        measured ~4% on 256 nodes of 2^20 bits). False when the system does not offer it."""
        if self._map is None or _MADV_COLLAPSE is None or end - start < HUGE_PAGE_BYTES:
            return False
        try:
            self._map.madvise(_MADV_COLLAPSE, start, end - start)
        except OSError:
            return False
        return True

    def trim(self) -> None:
        """Shrink the map to the rows (its tail pages were released already)."""
        if self._map is not None and len(self._map) > self.bits * self.width:
            self._remap(self.bits * self.width)

    def detach(self) -> mmap.mmap | None:
        """Give up the map (the group is gone); returns it to be released."""
        return self._remap(0)

    # -- lookups -------------------------------------------------------------------------------
    def match(self, cols: npt.NDArray[np.intp], live: Packed | None) -> tuple[npt.NDArray[np.unsignedinteger], int]:
        """AND of the k rows per key of (k, n) positions, masked to the live slots (None: all
        live): (n, words) words whose set bits are candidate slots, and the bits per word.

        The keys go in chunks of about _MATCH_CHUNK_BYTES of rows: the gather buffer and the
        chunk of results stay in cache while k gathers are ANDed in, instead of a fresh
        batch-sized temporary per hash going through memory (measured ~20% faster at 4-word rows).
        """
        n = cols.shape[1]
        if self.change is not None:
            return self._match_during_change(cols, live), 8
        words = self.words
        assert words is not None
        dtype, per_row = words.dtype, words.shape[1]
        table = words.reshape(-1) if per_row == 1 else words
        out = np.empty((n,) + table.shape[1:], dtype=dtype)
        step = max(_MIN_MATCH_KEYS, _MATCH_CHUNK_BYTES // (per_row * dtype.itemsize))
        tmp = np.empty((min(step, n),) + table.shape[1:], dtype=dtype)
        for lo in range(0, n, step):
            hi = min(n, lo + step)
            acc, buf = out[lo:hi], tmp[:hi - lo]
            # mode="wrap": positions were bounds-checked by the caller, and np.take with out=
            # and the default mode="raise" copies through an extra buffer.
            np.take(table, cols[0, lo:hi], axis=0, out=acc, mode="wrap")
            for j in range(1, cols.shape[0]):
                np.take(table, cols[j, lo:hi], axis=0, out=buf, mode="wrap")
                np.bitwise_and(acc, buf, out=acc)
        if live is not None:
            np.bitwise_and(out, live.view(dtype), out=out)
        return out.reshape(n, per_row), dtype.itemsize * 8

    def _match_during_change(self, cols: npt.NDArray[np.intp], live: Packed | None) -> npt.NDArray[np.uint8]:
        """The same AND while rows sit at two strides: each row is read where it is now, as
        bytes, through a byte-granular window over the map (slower; only while rows move)."""
        flat, width = self.flat, self.live_width
        assert flat is not None
        window = as_strided(flat, shape=(flat.size - width + 1, width), strides=(1, 1), writeable=False)
        acc = window[self.row_offsets(cols[0])]
        for j in range(1, cols.shape[0]):
            np.bitwise_and(acc, window[self.row_offsets(cols[j])], out=acc)
        if live is not None:
            np.bitwise_and(acc, live, out=acc)
        return acc


# -- groups -------------------------------------------------------------------------------------

class _Entry:
    """Where one node's filter lives. Exactly one copy answers lookups: a slot (home_slot >= 0)
    or a packed copy (home_bits). A copy being filled (to_slot >= 0, or to_bits) receives every
    delta too and holds positions below `copied` of the answering copy."""

    __slots__ = ("node_id", "home_slot", "home_bits", "to_slot", "to_bits", "copied", "ones")

    def __init__(self, node_id: str, packed: Packed, ones: int) -> None:
        self.node_id = node_id
        self.home_slot = -1
        self.home_bits: Packed | None = packed
        self.to_slot = -1
        self.to_bits: Packed | None = None
        self.copied = 0
        self.ones = ones

    @property
    def moving(self) -> bool:
        return self.to_slot >= 0 or self.to_bits is not None


class _Group:
    """One geometry's nodes: the slice, the packed copies, and which slot belongs to whom."""

    def __init__(self, geometry: Geometry) -> None:
        self.geometry = geometry
        self.slice = _Slice(geometry.bits)
        self.entries: dict[str, _Entry] = {}
        self.owner: list[_Entry | None] = []   # per slot: the node answering from it or moving into it
        self.live: Packed | None = None          # live slots (bit s set: slot s answers); None: all
        self.any_live = False
        self.names = np.empty(0, dtype=object)   # node id per live slot
        self.packed_homes: list[_Entry] = []

    def refresh(self) -> None:
        """Recompute the lookup tables after slots or homes changed (O(slots + nodes))."""
        live = np.zeros(len(self.owner), dtype=bool)
        names = np.empty(len(self.owner), dtype=object)
        for s, e in enumerate(self.owner):
            if e is not None and e.home_slot == s:
                live[s] = True
                names[s] = e.node_id
        self.any_live = bool(live.any())
        self.live = None if live.all() else np.packbits(live, bitorder="little")
        self.names = names
        self.packed_homes = [e for e in self.entries.values() if e.home_slot < 0]

    @property
    def nbytes(self) -> int:
        copies = sum((e.home_bits.nbytes if e.home_bits is not None else 0)
                     + (e.to_bits.nbytes if e.to_bits is not None else 0) for e in self.entries.values())
        return self.slice.nbytes + copies

    def _free(self, slot: int) -> None:
        if 0 <= slot < len(self.owner):
            self.owner[slot] = None

    # -- a node's bits ---------------------------------------------------------------------------
    def read(self, e: _Entry, pos: npt.NDArray[np.intp]) -> npt.NDArray[np.uint8]:
        if e.home_bits is not None:
            return _packed_read(e.home_bits, pos)
        return self.slice.read(pos, e.home_slot)

    def write(self, e: _Entry, pos: npt.NDArray[np.intp], value: bool) -> None:
        """Into every copy of the node: the answering one and one being filled."""
        if not pos.size:
            return
        for bits in (e.home_bits, e.to_bits):
            if bits is not None:
                _packed_write(bits, pos, value)
        for slot in (e.home_slot, e.to_slot):
            if slot >= 0:
                self.slice.write(pos, slot, value)

    def packed(self, e: _Entry) -> Packed:
        """The node's answering copy in packed form (a copy)."""
        if e.home_bits is not None:
            return e.home_bits.copy()
        m = self.geometry.bits
        out = np.empty(self.geometry.byte_size, dtype=np.uint8)
        for lo in range(0, m, CHUNK_POSITIONS):
            hi = min(m, lo + CHUNK_POSITIONS)
            out[lo // 8:(hi + 7) // 8] = np.packbits(self._home_column(e, lo, hi), bitorder="little")
        return out

    def _home_column(self, e: _Entry, lo: int, hi: int) -> npt.NDArray[np.uint8]:
        if e.home_bits is not None:
            return _column_bits(e.home_bits, lo, hi)
        if self.slice.change is None:
            return self.slice.column(lo, hi, e.home_slot)
        return self.slice.read(np.arange(lo, hi, dtype=np.intp), e.home_slot)

    # -- membership ------------------------------------------------------------------------------
    def add(self, node_id: str, packed: Packed, ones: int) -> None:
        self.entries[node_id] = _Entry(node_id, packed, ones)
        self.refresh()

    def replace(self, e: _Entry, packed: Packed, ones: int) -> list[Any]:
        """The new packed copy answers for e at once; a slot the node holds or moves into stays
        reserved (masked) and is refilled from the new copy. Returns copies to release."""
        retired = [b for b in (e.home_bits, e.to_bits) if b is not None]
        keep = e.to_slot if e.to_slot >= 0 else (e.home_slot if e.to_bits is None else -1)
        if e.home_slot >= 0 and e.home_slot != keep:
            self._free(e.home_slot)
        e.home_slot, e.home_bits = -1, packed
        e.to_slot, e.to_bits, e.copied, e.ones = keep, None, 0, ones
        self.refresh()
        return retired

    def drop(self, node_id: str) -> list[Any]:
        e = self.entries.pop(node_id)
        self._free(e.home_slot)
        self._free(e.to_slot)
        self.refresh()
        return [b for b in (e.home_bits, e.to_bits) if b is not None]

    def copy_step(self, e: _Entry, chunk: int) -> tuple[bool, list[Any]]:
        """Copy the next chunk of e's answering copy into its new one; at the end the new copy
        answers and the old one is released. (finished, copies to release)."""
        m = self.geometry.bits
        lo, hi = e.copied, min(m, e.copied + chunk)
        bits = self._home_column(e, lo, hi)
        if e.to_slot >= 0:
            self.slice.set_column(lo, hi, e.to_slot, bits)
        else:
            assert e.to_bits is not None
            e.to_bits[lo // 8:(hi + 7) // 8] = np.packbits(bits, bitorder="little")
        e.copied = hi
        if hi < m:
            return False, []
        retired: list[Any] = []
        if e.to_slot >= 0:
            if e.home_bits is not None:
                retired.append(e.home_bits)
            else:
                self._free(e.home_slot)
            e.home_slot, e.home_bits, e.to_slot = e.to_slot, None, -1
        else:
            self._free(e.home_slot)
            e.home_slot, e.home_bits, e.to_bits = -1, e.to_bits, None
        e.copied = 0
        self.refresh()
        return True, retired

    # -- layout plan -------------------------------------------------------------------------------
    def width_bounds(self) -> tuple[int, int]:
        """Slice widths (bytes) that keep a settled group within the slack: every node but
        fewer than 8 in a slot, at most N / SLACK_DIVISOR slots free."""
        n = len(self.entries)
        return n // 8, n * (SLACK_DIVISOR + 1) // (8 * SLACK_DIVISOR)

    def plan(self) -> tuple[str, _Entry | int] | None:
        """The next layout step: ("copy", entry), ("resize", width in bytes), or None."""
        if self.slice.change is not None:   # a width change in flight comes first
            ch = self.slice.change
            return "resize", ch.high if ch.widening else ch.low
        for e in self.entries.values():
            if e.moving:
                return "copy", e
        low, high = self.width_bounds()
        width = self.slice.width
        if width < low:
            return "resize", low
        free = [s for s, owner in enumerate(self.owner) if owner is None]
        if width > high:
            # Narrow to `high` bytes: first the nodes in the slots that go move to a free slot
            # below, or to a packed copy when none is left.
            cut = 8 * high
            occupants = [owner for owner in self.owner[cut:] if owner is not None]
            if not occupants:
                return "resize", high
            e = occupants[0]                      # answers from that slot (no move pending)
            below = [s for s in free if s < cut]
            if below:
                e.to_slot = below[0]
                self.owner[below[0]] = e
            else:
                e.to_bits = np.empty(self.geometry.byte_size, dtype=np.uint8)
            e.copied = 0
            return "copy", e
        waiting = [e for e in self.packed_homes if not e.moving]
        if free and waiting:
            e = waiting[0]
            e.to_slot, e.copied = free[0], 0
            self.owner[free[0]] = e
            return "copy", e
        return None


class _TakeTurns:
    """The index lock as callers take it. Layout work holds the lock in many short chunks; with
    a plain lock the worker, still running when it releases, takes the lock straight back while
    a woken waiter is being scheduled, so lookups could wait through many chunks. Before each
    chunk the worker therefore lets every caller that was already waiting go first."""

    def __init__(self, mutex: AbstractContextManager[Any]) -> None:
        self._mutex = mutex
        self._gate = threading.Condition(threading.Lock())
        self._arrived = 0     # callers that asked for the lock
        self._served = 0      # of those, callers that got it (or gave up on an error)

    def __enter__(self) -> None:
        with self._gate:
            self._arrived += 1
        try:
            self._mutex.__enter__()
        finally:
            with self._gate:
                self._served += 1
                self._gate.notify_all()

    def __exit__(self, *exc: object) -> None:
        self._mutex.__exit__(*exc)

    def let_waiters_in(self) -> None:
        """Block until every caller waiting now has had the lock (called without holding it)."""
        with self._gate:
            target = self._arrived
            self._gate.wait_for(lambda: self._served >= target)


def default_workers() -> int:
    """Threads a large batch is split across: the cores this process may run on, at most 4."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:   # not on Linux
        cores = os.cpu_count() or 1
    return max(1, min(4, cores))


def _release(obj: Any) -> None:
    """Give a retired map's pages back a chunk at a time, then unmap it (arrays just go)."""
    if isinstance(obj, mmap.mmap) and not obj.closed:
        size = len(obj)
        for lo in range(0, size, CHUNK_RELEASE_BYTES):
            if hasattr(obj, "madvise"):
                obj.madvise(mmap.MADV_DONTNEED, lo, min(CHUNK_RELEASE_BYTES, size - lo))
        try:
            obj.close()
        except BufferError:   # a view is still alive somewhere: the map goes with it
            pass


class RoutingIndex:
    """Bit-sliced replicas of every node's filter, grouped by geometry; thread-safe.

    workers: threads that match one large batch (>= _PARALLEL_MIN_KEYS keys), a slice each.
    Once a group's rows outgrow the cache, matching is bound by memory latency, and each core
    keeps its own row reads in flight. 1 does every lookup on the calling thread; None (or 0)
    picks default_workers().

    chunk_positions / chunk_bytes: the layout work done per lock hold (see the module
    docstring); lock: the lock that guards the index (a benchmark passes one that times its
    holds). Layout work itself is serialised by a second lock, never held by lookups.
    """

    def __init__(self, workers: int | None = None, *, chunk_positions: int = CHUNK_POSITIONS,
                 chunk_bytes: int = CHUNK_MOVE_BYTES, lock: AbstractContextManager[Any] | None = None) -> None:
        if workers is None or workers == 0:
            workers = default_workers()
        if workers < 1:
            raise RoutingIndexError(f"workers must be at least 1 (or 0 for one per core), got {workers}")
        if chunk_positions < 8 or chunk_positions % 8:
            raise RoutingIndexError(f"chunk_positions must be a positive multiple of 8, got {chunk_positions}")
        if chunk_bytes < 1:
            raise RoutingIndexError(f"chunk_bytes must be at least 1, got {chunk_bytes}")
        self._mutex: AbstractContextManager[Any] = lock if lock is not None else threading.Lock()
        self._lock = _TakeTurns(self._mutex)  # every caller; layout work takes _mutex directly
        self._work = threading.Lock()        # one thread at a time does layout work
        self._groups: dict[Geometry, _Group] = {}
        self._geometry_of: dict[str, Geometry] = {}
        self._workers = workers
        self._pool: ThreadPoolExecutor | None = None
        self._chunk_positions = chunk_positions
        self._chunk_bytes = chunk_bytes
        self._task: Iterator[None] | None = None
        self._retired: list[Any] = []       # memory to give back once the lock is released

    @property
    def workers(self) -> int:
        """Threads a large batch is split across (see the class docstring)."""
        return self._workers

    @workers.setter
    def workers(self, workers: int) -> None:
        if workers < 1:
            raise RoutingIndexError(f"workers must be at least 1, got {workers}")
        with self._lock:
            if workers == self._workers:
                return                    # keep the pool and its threads
            self._workers = workers
            if self._pool is not None:   # a new count gets a pool of its own size
                self._pool.shutdown(wait=False)
                self._pool = None

    # -- mutations ---------------------------------------------------------------------------
    def install(self, node_id: str, geometry: Geometry, column: Any, *, settle: bool = True) -> None:
        """Replace node_id's whole filter: packed bytes (m/8, little-endian bit order, as
        BloomFilter.to_bytes() gives), or 0/1 per bit.

        The new filter answers at once (the node may move to another geometry group); lookups
        see either the old filter or the new one, never a mix. settle=False leaves moving it
        into a slot to settle() (call that from a worker thread).
        """
        packed = packed_copy(column, geometry, node_id)
        ones = count_ones(packed)
        with self._lock:
            old = self._geometry_of.get(node_id)
            if old is not None and old != geometry:
                self._drop(node_id, old)
            group = self._groups.get(geometry)
            if group is None:
                group = self._groups[geometry] = _Group(geometry)
            entry = group.entries.get(node_id)
            if entry is None:
                group.add(node_id, packed, ones)
            else:
                self._retired.extend(group.replace(entry, packed, ones))
            self._geometry_of[node_id] = geometry
        del packed
        self._drain()
        if settle:
            self.settle()

    def apply(self, node_id: str, set_positions: npt.ArrayLike, cleared_positions: npt.ArrayLike = (),
              *, strict: bool = True) -> None:
        """Flip bits of node_id's filter in place (a decoded delta).

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
            entry = group.entries[node_id]
            sp, cp = s.astype(np.intp), c.astype(np.intp)
            if strict:
                if sp.size and np.any(group.read(entry, sp)):
                    raise FilterDivergedError(f"delta sets a bit of node {node_id!r} that is already 1")
                if cp.size and not np.all(group.read(entry, cp)):
                    raise FilterDivergedError(f"delta clears a bit of node {node_id!r} that is already 0")
            touched = np.unique(np.concatenate([sp, cp]))
            before = int(group.read(entry, touched).sum(dtype=np.int64))
            group.write(entry, sp, True)
            group.write(entry, cp, False)
            entry.ones += int(group.read(entry, touched).sum(dtype=np.int64)) - before

    def remove(self, node_id: str, *, settle: bool = True) -> bool:
        """Drop node_id's filter and free its slot; False if it had none. settle=False leaves
        the layout work this may start (refilling the slot, narrowing) to settle()."""
        with self._lock:
            geometry = self._geometry_of.get(node_id)
            if geometry is None:
                return False
            self._drop(node_id, geometry)
        self._drain()
        if settle:
            self.settle()
        return True

    def _drop(self, node_id: str, geometry: Geometry) -> None:
        """Under the lock: node_id leaves its group (an empty group goes)."""
        group = self._groups[geometry]
        self._retired.extend(group.drop(node_id))
        del self._geometry_of[node_id]
        if not group.entries:
            del self._groups[geometry]
            self._retired.append(group.slice.detach())

    def _drain(self) -> None:
        """Release retired copies and maps outside the lock."""
        while self._retired:
            try:
                obj = self._retired.pop()
            except IndexError:   # another thread took the last one
                return
            _release(obj)

    # -- layout work ---------------------------------------------------------------------------
    def settle(self, max_chunks: int | None = None) -> bool:
        """Do pending layout work, one chunk per lock hold; True when none is left.

        Safe to call from any thread (a worker thread keeps it off an event loop); threads take
        turns. max_chunks bounds the chunks done in this call.
        """
        with self._work:
            done = 0
            while max_chunks is None or done < max_chunks:
                if self._task is None:
                    with self._mutex:
                        self._task = self._plan()
                    if self._task is None:
                        return True
                try:
                    next(self._task)
                except StopIteration:
                    self._task = None
                self._drain()
                done += 1
                self._lock.let_waiters_in()
            if self._task is None:
                with self._mutex:
                    self._task = self._plan()
            return self._task is None

    def _plan(self) -> Iterator[None] | None:
        """Under the lock: a generator doing the next layout step, one chunk per next()."""
        for group in self._groups.values():
            step = group.plan()
            if step is None:
                continue
            kind, what = step
            if isinstance(what, _Entry):
                return self._copy(group, what)
            return self._change_width(group, what)
        return None

    def _alive(self, group: _Group) -> bool:
        return self._groups.get(group.geometry) is group

    def _copy(self, group: _Group, entry: _Entry) -> Iterator[None]:
        while True:
            with self._mutex:
                if not self._alive(group) or group.entries.get(entry.node_id) is not entry or not entry.moving:
                    return
                finished, retired = group.copy_step(entry, self._chunk_positions)
                self._retired.extend(retired)
            if finished:
                return
            yield

    def _change_width(self, group: _Group, width: int) -> Iterator[None]:
        sl = group.slice
        with self._mutex:
            if not self._alive(group):
                return
            if sl.change is None:
                if width < sl.width:
                    if any(owner is not None for owner in group.owner[8 * width:]):
                        return                   # a slot there was taken since the plan
                    del group.owner[8 * width:]
                    group.refresh()
                finished, old = sl.begin_resize(width)
                if old is not None:
                    self._retired.append(old)
                if finished:
                    group.owner.extend([None] * (8 * width - len(group.owner)))
                    group.refresh()
                    return
        yield
        while True:
            with self._mutex:
                if not self._alive(group):
                    return
                finished = sl.move_step(self._chunk_bytes)
                if finished:
                    group.owner.extend([None] * (8 * sl.width - len(group.owner)))
                    group.refresh()
            if finished:
                break
            yield
        start, end = sl.tail()   # a narrowing leaves unused pages at the end of the map
        for lo in range(start, end, CHUNK_RELEASE_BYTES):
            yield
            with self._mutex:
                if not self._alive(group):
                    return
                sl.release(lo, min(end, lo + CHUNK_RELEASE_BYTES))
        if end > start:
            with self._mutex:
                if not self._alive(group):
                    return
                sl.trim()
        for lo in range(0, sl.bits * sl.width - HUGE_PAGE_BYTES + 1, HUGE_PAGE_BYTES):
            yield
            with self._mutex:
                if not self._alive(group) or sl.change is not None or not sl.collapse(lo, lo + HUGE_PAGE_BYTES):
                    return

    # -- lookups -----------------------------------------------------------------------------
    def geometries(self) -> list[Geometry]:
        with self._lock:
            return list(self._groups)

    def locate(self, keys: Sequence[bytes], positions: PositionsFn) -> Candidates:
        """Candidates per key: hash the batch once per geometry, AND k rows per key per group.

        Hashing runs outside the lock; a group that appeared meanwhile is hashed under it, so
        a node moving between groups is never missed. Every key is matched against every group
        in one lock hold; a large batch takes one hold per LOOKUP_HOLD_KEYS keys and lets the
        callers waiting meanwhile (a single-key lookup, a delta) go first between them.
        """
        n = len(keys)
        hashed = {geo: positions(keys, geo) for geo in self.geometries()} if n else {}
        parts: list[tuple[npt.NDArray[np.intp], npt.NDArray[np.object_]]] = []
        step = _PARALLEL_MIN_KEYS if n >= _PARALLEL_MIN_KEYS else LOOKUP_HOLD_KEYS
        for lo in range(0, n, step):
            hi = min(n, lo + step)
            if lo:
                self._lock.let_waiters_in()
            with self._lock:
                for geo, group in self._groups.items():
                    pos = hashed.get(geo)
                    pos = positions(keys[lo:hi], geo) if pos is None else pos[lo:hi]
                    found_keys, names = self._match_group(group, pos)
                    if found_keys.size:
                        parts.append((found_keys + lo if lo else found_keys, names))
        if not parts:
            return Candidates(np.zeros(n + 1, dtype=np.int64), [])
        found, names = _merge_by_key(parts)
        offsets = np.zeros(n + 1, dtype=np.int64)
        np.cumsum(np.bincount(found, minlength=n), out=offsets[1:])
        return Candidates(offsets, names.tolist())

    def _match_group(self, group: _Group, pos: npt.NDArray[np.uint64]) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.object_]]:
        """(key index, node id) pairs of one group, sorted by key; a large batch in one slice
        per worker thread, run at once (numpy releases the GIL in the gathers and ANDs)."""
        n = pos.shape[0]
        if n and int(pos.max()) >= group.geometry.bits:
            raise RoutingIndexError(f"position {int(pos.max())} is outside the filter of {group.geometry.bits} bits")
        if self._workers == 1 or n < _PARALLEL_MIN_KEYS:
            return _lookup(group, pos)
        if self._pool is None:
            self._pool = ThreadPoolExecutor(self._workers - 1, thread_name_prefix="routing-index")
        bounds = np.linspace(0, n, self._workers + 1).astype(int).tolist()
        jobs = [self._pool.submit(_lookup, group, pos[a:b]) for a, b in zip(bounds[1:-1], bounds[2:])]
        parts = [_lookup(group, pos[:bounds[1]])] + [job.result() for job in jobs]
        keys = np.concatenate([k + lo for (k, _), lo in zip(parts, bounds)])
        names = np.concatenate([v for _, v in parts])
        return keys, names

    def contains(self, node_id: str, positions_row: npt.ArrayLike) -> bool:
        """Whether all given positions are set in node_id's filter (tests, diagnostics)."""
        with self._lock:
            geometry = self._geometry_of.get(node_id)
            if geometry is None:
                return False
            group = self._groups[geometry]
            pos = np.asarray(positions_row, dtype=np.uint64).astype(np.intp).ravel()
            return bool(np.all(group.read(group.entries[node_id], pos)))

    # -- introspection -----------------------------------------------------------------------
    def geometry_of(self, node_id: str) -> Geometry | None:
        with self._lock:
            return self._geometry_of.get(node_id)

    def packed(self, node_id: str) -> bytes:
        """node_id's filter in the snapshot's RAW format (m/8 bytes, little-endian bit order).
        Tests and diagnostics: a filter held in a slot is read out under one O(m) lock hold."""
        return self._packed_with_geometry(node_id)[0].tobytes()

    def column(self, node_id: str) -> npt.NDArray[np.uint8]:
        """node_id's filter as 0/1 per bit (a copy of m bytes; tests, diagnostics)."""
        data, geometry = self._packed_with_geometry(node_id)
        return np.unpackbits(data, bitorder="little", count=geometry.bits)

    def _packed_with_geometry(self, node_id: str) -> tuple[Packed, Geometry]:
        with self._lock:
            geometry = self._geometry_of[node_id]
            group = self._groups[geometry]
            return group.packed(group.entries[node_id]), geometry

    def popcount(self, node_id: str) -> int:
        """Set bits of node_id's filter, kept with every install and delta (no O(m) count)."""
        with self._lock:
            return self._groups[self._geometry_of[node_id]].entries[node_id].ones

    def popcounts(self) -> dict[str, int]:
        """popcount() of every node in one lock hold (status, metrics and the monitor read them all)."""
        with self._lock:
            return {node_id: e.ones for g in self._groups.values() for node_id, e in g.entries.items()}

    def nodes(self) -> list[str]:
        with self._lock:
            return list(self._geometry_of)

    def memory_bytes(self) -> int:
        """Bytes of filter data held: slices (whole pages) and packed copies, including a
        copy being installed or moved."""
        with self._lock:
            return sum(g.nbytes for g in self._groups.values())

    def group_sizes(self) -> dict[Geometry, int]:
        with self._lock:
            return {geo: len(g.entries) for geo, g in self._groups.items()}

    def slice_widths(self) -> dict[Geometry, int]:
        """Row bytes of every group's slice (8 slots a byte; diagnostics)."""
        with self._lock:
            return {geo: g.slice.width for geo, g in self._groups.items()}


def _lookup_one(group: _Group, pos: npt.NDArray[np.uint64]) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.object_]]:
    """_lookup for a single key (a Read, a Write, a single Locate): the same AND of the key's k
    rows, its set bits read in Python. The vectorised path's fixed cost (some twenty numpy calls
    sized for batches) is most of a one-key lookup: `shardsieve bench reads` measured ~150 us
    per call in the coordinator, this path a small part of it."""
    rows = pos[0].astype(np.intp)
    names: list[str] = []
    if group.any_live:
        words = group.slice.words
        assert words is not None
        acc = np.bitwise_and.reduce(words[rows], axis=0)
        if group.live is not None:
            acc = acc & group.live.view(acc.dtype)
        bits = int.from_bytes(acc.tobytes(), "little")
        slot_names = group.names
        while bits:
            low = bits & -bits
            names.append(slot_names[low.bit_length() - 1])
            bits ^= low
    for e in group.packed_homes:
        assert e.home_bits is not None
        home = e.home_bits
        if all(int(home[p >> 3]) >> (p & 7) & 1 for p in rows.tolist()):
            names.append(e.node_id)
    found = np.zeros(len(names), dtype=np.intp)
    out = np.empty(len(names), dtype=object)
    out[:] = names
    return found, out


def _lookup(group: _Group, pos: npt.NDArray[np.uint64]) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.object_]]:
    """(key index, node id) pairs of one group for (n, k) positions, sorted by key: the slice's
    live slots first, then each node answering from a packed copy."""
    cols = pos.T.astype(np.intp, order="C")   # (k, n): one gather per hash
    if pos.shape[0] == 1 and group.slice.change is None:
        return _lookup_one(group, pos)
    parts: list[tuple[npt.NDArray[np.intp], npt.NDArray[np.object_]]] = []
    if group.any_live:
        acc, bits_per_word = group.slice.match(cols, group.live)
        keys, slots = decode(acc, bits_per_word)
        if keys.size:
            parts.append((keys, group.names[slots]))
    if group.packed_homes:
        byte, shift = cols >> 3, (cols & 7).astype(np.uint8)
        for e in group.packed_homes:
            assert e.home_bits is not None
            keys = _packed_hits(e.home_bits, byte, shift)
            if keys.size:
                names = np.empty(keys.size, dtype=object)
                names.fill(e.node_id)
                parts.append((keys, names))
    if not parts:
        return np.zeros(0, dtype=np.intp), np.empty(0, dtype=object)
    return _merge_by_key(parts)


def _merge_by_key(parts: list[tuple[npt.NDArray[np.intp], npt.NDArray[np.object_]]]) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.object_]]:
    """Concatenate (keys, names) parts, each sorted by key, into one sorted by key (stable)."""
    if len(parts) == 1:
        return parts[0]
    found = np.concatenate([k for k, _ in parts])
    names = np.concatenate([v for _, v in parts])
    order = np.argsort(found, kind="stable")
    return found[order], names[order]
