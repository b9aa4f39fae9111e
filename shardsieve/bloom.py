"""Bloom filter on a bitarray, and the counting variant a node keeps.

Both are plain objects (no I/O). Positions come from shardsieve.hashing (scheme
MMH3_KM_V1), so a batch of keys is hashed once and the (n, k) positions can be tested
against or added to any number of filters of the same geometry.

Bit layout: bit p of the filter is bit (p mod 8) of byte p // 8 (a little-endian
bitarray); the bytes of the bitarray are the raw snapshot format.

Vectorised kernels work on a numpy uint8 view of the bitarray's buffer, in chunks of
hashing.CHUNK_KEYS keys, with positions laid out (k, chunk) so the k tests of a query
combine with element-wise ANDs over contiguous rows.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import numpy.typing as npt
from bitarray import bitarray

from shardsieve import checksum as _checksum
from shardsieve.changeset import ChangeSet, sorted_unique
from shardsieve.geometry import Geometry
from shardsieve.sizing import estimated_keys, fill_fpr
from shardsieve.hashing import CHUNK_KEYS, digests, key_positions, positions_from_digests, positions_kn

_S3 = np.uint64(3)
_M7 = np.uint64(7)
_M7_8 = np.uint8(7)
_ONE8 = np.uint8(1)
_BIT_MASKS = np.array([1 << i for i in range(8)], dtype=np.uint8)
_SCRATCH_MAX_BITS = 1 << 26  # bulk inserts use an m-byte scratch only up to 64 MiB
_FLIP_LOG_MIN = 1 << 16  # flips a counting filter logs before it switches to a baseline copy
_UNPACK_CHUNK = 1 << 20  # bytes of filter unpacked at a time when listing set positions

Positions = npt.NDArray[np.uint64]


class FilterDivergedError(ValueError):
    """A change set does not fit this filter's bits: a bit to set is already 1, a bit to
    clear is already 0, or a position is >= m. The replica has diverged from its source
    (or the change was applied twice); it needs a snapshot, not a guess."""


def _endian(bits: bitarray) -> str:
    e = bits.endian  # an attribute in bitarray >= 3.4, a method before
    return e if isinstance(e, str) else e()


def _byte_and_shift(pos: Positions) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.uint8]]:
    """Byte index (as int64, positions are < 2^40) and bit-in-byte of every position."""
    byte = (pos >> _S3).view(np.int64)
    shift = pos.astype(np.uint8)   # low 8 bits (a 1-byte pass), then the bit in byte
    shift &= _M7_8
    return byte, shift


def _set_bits(buf: npt.NDArray[np.uint8], pos: Positions) -> None:
    """OR the bits at pos (any shape, duplicates allowed) into buf.

    A fancy `buf[i] |= mask` with a repeated byte index keeps only the last write, so bits
    lost to a same-pass collision are re-applied until every bit reads back set (a pass
    only ever ORs into the pre-pass value, so no earlier bit can be lost).
    """
    byte, shift = _byte_and_shift(np.ascontiguousarray(pos).ravel())
    mask = _BIT_MASKS[shift]
    while byte.size:
        buf[byte] |= mask
        missing = (buf[byte] & mask) == 0
        if not missing.any():
            return
        byte = byte[missing]
        mask = mask[missing]


def _clear_bits(buf: npt.NDArray[np.uint8], pos: Positions) -> None:
    """AND-NOT the bits at pos (duplicates allowed) out of buf; same retry scheme as _set_bits."""
    byte, shift = _byte_and_shift(np.ascontiguousarray(pos).ravel())
    keep = ~_BIT_MASKS[shift]
    while byte.size:
        buf[byte] &= keep
        still = (buf[byte] & ~keep) != 0
        if not still.any():
            return
        byte = byte[still]
        keep = keep[still]


def _byte_groups(pos: Positions) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.uint8]]:
    """For sorted positions: each distinct byte once, with the OR of its bit masks."""
    byte, shift = _byte_and_shift(pos)
    masks = _BIT_MASKS[shift]
    first = np.empty(byte.size, dtype=np.bool_)
    first[0] = True
    np.not_equal(byte[1:], byte[:-1], out=first[1:])
    starts = np.flatnonzero(first)
    return byte[starts], np.bitwise_or.reduceat(masks, starts)


def _or_sorted(buf: npt.NDArray[np.uint8], pos: Positions) -> None:
    """Set the bits at sorted positions in one exact scatter (no repeated byte index)."""
    if pos.size:
        byte, mask = _byte_groups(pos)
        buf[byte] |= mask


def _and_not_sorted(buf: npt.NDArray[np.uint8], pos: Positions) -> None:
    """Clear the bits at sorted positions in one exact scatter."""
    if pos.size:
        byte, mask = _byte_groups(pos)
        buf[byte] &= ~mask


def _strictly_increasing(arr: Positions, name: str) -> Positions:
    """The positions sorted; FilterDivergedError when one repeats (it would flip twice)."""
    if arr.size < 2:
        return arr
    if not bool(np.all(arr[1:] > arr[:-1])):
        arr = np.sort(arr)
        if not bool(np.all(arr[1:] != arr[:-1])):
            raise FilterDivergedError(f"a position to {name} appears twice in the change set")
    return arr


def _test_bits(buf: npt.NDArray[np.uint8], pos: Positions) -> npt.NDArray[np.uint8]:
    """0/1 per position (any shape)."""
    byte, shift = _byte_and_shift(np.ascontiguousarray(pos))
    return (buf[byte] >> shift) & _ONE8


def _contains_kn(buf: npt.NDArray[np.uint8], pos_kn: Positions) -> npt.NDArray[np.bool_]:
    """Membership per column of a (k, n) position array: AND over the k rows."""
    acc: npt.NDArray[np.uint8] | None = None
    for row in pos_kn:
        byte = (row >> _S3).view(np.int64)
        shift = row.astype(np.uint8)
        shift &= _M7_8
        bit = buf.take(byte)
        bit >>= shift
        if acc is None:
            acc = bit
        else:
            acc &= bit
    assert acc is not None
    acc &= _ONE8
    return acc.view(np.bool_)


def _positions_of_bytes(buf: npt.NDArray[np.uint8]) -> Positions:
    """Sorted positions of the 1 bits of a little-endian bit buffer, a block at a time."""
    parts = []
    for start in range(0, buf.size, _UNPACK_CHUNK):
        block = buf[start:start + _UNPACK_CHUNK]
        nz = np.flatnonzero(block)
        if nz.size == 0:
            continue
        if nz.size * 8 > block.size:   # dense: unpack the whole block
            found = np.flatnonzero(np.unpackbits(block, bitorder="little")).astype(np.uint64)
        else:                          # sparse: unpack only the non-zero bytes
            bits = np.flatnonzero(np.unpackbits(block[nz], bitorder="little")).astype(np.uint64)
            found = nz.astype(np.uint64)[bits >> _S3] * np.uint64(8) + (bits & _M7)
        found += np.uint64(start * 8)
        parts.append(found)
    if not parts:
        return np.zeros(0, dtype=np.uint64)
    return np.concatenate(parts)


def _unique_counts(values: Positions) -> tuple[Positions, npt.NDArray[np.int64]]:
    """Sorted distinct values and how often each occurs (sort based, like changeset.sorted_unique)."""
    s = np.sort(values.ravel())
    if s.size == 0:
        return s.astype(np.uint64), np.zeros(0, dtype=np.int64)
    first = np.empty(s.size, dtype=np.bool_)
    first[0] = True
    np.not_equal(s[1:], s[:-1], out=first[1:])
    starts = np.flatnonzero(first)
    counts = np.empty(starts.size, dtype=np.int64)
    counts[:-1] = starts[1:] - starts[:-1]
    counts[-1] = s.size - starts[-1]
    return s[starts], counts


class BloomFilter:
    """A Bloom filter of `geometry.bits` bits on a little-endian bitarray.

    `bits` is the live bitarray: read it freely, change it only through add*/apply so the
    checksum stays true. checksum (shardsieve.checksum) is kept incrementally by apply()
    and by small adds; a bulk add_batch (more positions than m/64) marks it stale and the
    next read recomputes it once from the bits, cheaper than sorting millions of positions.
    """

    __slots__ = ("geometry", "_bits", "_buf", "_checksum")

    def __init__(self, geometry: Geometry, bits: bitarray | None = None) -> None:
        geometry.validate()
        self.geometry = geometry
        if bits is None:
            bits = bitarray(geometry.bits, endian="little")
            bits.setall(0)
            self._checksum: int | None = 0
        else:
            if not isinstance(bits, bitarray):
                raise TypeError(f"bits must be a bitarray, got {type(bits).__name__}")
            if len(bits) != geometry.bits:
                raise ValueError(f"bits has length {len(bits)}, geometry needs {geometry.bits}")
            if _endian(bits) != "little":
                bits = bitarray(bits, endian="little")
            self._checksum = None
        self._bits = bits
        self._buf = np.frombuffer(bits, dtype=np.uint8)
        spare = len(self._buf) * 8 - geometry.bits
        if spare:
            # bitarray does not promise zero pad bits in its buffer; our kernels read it raw
            self._buf[-1] &= np.uint8(0xFF >> spare)

    @property
    def bits(self) -> bitarray:
        """The live bit vector (little-endian bitarray of length m)."""
        return self._bits

    # -- checksum -------------------------------------------------------------------
    @property
    def checksum(self) -> int:
        if self._checksum is None:
            self._checksum = _checksum.xor_of(self.set_positions())
        return self._checksum

    # -- inserts and queries ----------------------------------------------------------
    def add(self, key: bytes | str) -> None:
        self.add_positions(key_positions(key, self.geometry).reshape(1, -1))

    def add_batch(self, keys: Sequence[bytes | str]) -> None:
        """Insert every key; hashes in cache-sized chunks."""
        g = self.geometry
        n = len(keys)
        if n * g.hashes * 64 <= g.bits:
            # small batch: keep the checksum exact as we go
            for start in range(0, n, CHUNK_KEYS):
                self.add_positions(positions_from_digests(digests(keys[start:start + CHUNK_KEYS], g.seed), g))
            return
        self._checksum = None
        buf = self._buf
        if g.bits <= _SCRATCH_MAX_BITS and n * g.hashes * 16 >= g.bits:
            # One byte per bit: duplicate positions all write the same 1, so a plain
            # scatter is exact; one packbits then ORs the batch into the filter.
            scratch = np.zeros(g.bits, dtype=np.uint8)
            for start in range(0, n, CHUNK_KEYS):
                pos = positions_kn(digests(keys[start:start + CHUNK_KEYS], g.seed), g)
                scratch[pos.reshape(-1).view(np.int64)] = 1
            np.bitwise_or(buf, np.packbits(scratch, bitorder="little"), out=buf)
            return
        for start in range(0, n, CHUNK_KEYS):
            _set_bits(buf, positions_kn(digests(keys[start:start + CHUNK_KEYS], g.seed), g))

    def add_positions(self, pos: Positions) -> None:
        """Insert keys given as positions (n, k) from hashing.positions."""
        pos = self._check_positions(pos)
        if self._checksum is not None:
            new = pos.ravel()[_test_bits(self._buf, pos.ravel()) == 0]
            if new.size:
                self._checksum ^= _checksum.xor_of(sorted_unique(new))
        _set_bits(self._buf, pos)

    def contains(self, key: bytes | str) -> bool:
        pos = key_positions(key, self.geometry)
        return bool(_test_bits(self._buf, pos).all())

    def __contains__(self, key: bytes | str) -> bool:
        return self.contains(key)

    def contains_batch(self, keys: Sequence[bytes | str]) -> npt.NDArray[np.bool_]:
        """Membership of every key as a bool array (True: maybe present, False: absent)."""
        g = self.geometry
        n = len(keys)
        out = np.empty(n, dtype=np.bool_)
        buf = self._buf
        for start in range(0, n, CHUNK_KEYS):
            d = digests(keys[start:start + CHUNK_KEYS], g.seed)
            out[start:start + d.shape[0]] = _contains_kn(buf, positions_kn(d, g))
        return out

    def contains_positions(self, pos: Positions) -> npt.NDArray[np.bool_]:
        """Membership of keys given as positions (n, k): hash once, test many filters."""
        pos = self._check_positions(pos)
        n = pos.shape[0]
        out = np.empty(n, dtype=np.bool_)
        kn = pos.T  # contiguous rows when pos came from hashing.positions
        for start in range(0, n, CHUNK_KEYS):
            out[start:start + CHUNK_KEYS] = _contains_kn(self._buf, kn[:, start:start + CHUNK_KEYS])
        return out

    def _check_positions(self, pos: Positions) -> Positions:
        pos = np.asarray(pos)
        if pos.ndim == 1:
            pos = pos.reshape(1, -1)
        if pos.ndim != 2 or pos.shape[1] != self.geometry.hashes:
            raise ValueError(f"positions must have shape (n, {self.geometry.hashes}), got {pos.shape}")
        if pos.dtype != np.uint64:
            pos = pos.astype(np.uint64)
        if pos.size and int(pos.max()) >= self.geometry.bits:
            raise ValueError(f"position {int(pos.max())} is outside the filter (m = {self.geometry.bits})")
        return pos

    # -- change sets ------------------------------------------------------------------
    def apply(self, changes: ChangeSet) -> None:
        """Apply a change set all-or-nothing; FilterDivergedError (and no change) if it does not fit."""
        m = self.geometry.bits
        s = _strictly_increasing(np.asarray(changes.set_positions, dtype=np.uint64), "set")
        c = _strictly_increasing(np.asarray(changes.cleared_positions, dtype=np.uint64), "clear")
        for name, arr in (("set", s), ("cleared", c)):
            if arr.size and int(arr[-1]) >= m:
                raise FilterDivergedError(f"{name} position {int(arr[-1])} is outside the filter (m = {m})")
        if s.size:
            already = np.flatnonzero(_test_bits(self._buf, s))
            if already.size:
                raise FilterDivergedError(
                    f"{already.size} position(s) to set are already 1 (first: {int(s[already[0]])})")
        if c.size:
            absent = np.flatnonzero(_test_bits(self._buf, c) == 0)
            if absent.size:
                raise FilterDivergedError(
                    f"{absent.size} position(s) to clear are already 0 (first: {int(c[absent[0]])})")
        # (bits to set were all 0 and bits to clear all 1, so the two lists are disjoint)
        _or_sorted(self._buf, s)
        _and_not_sorted(self._buf, c)
        if self._checksum is not None:
            self._checksum ^= _checksum.xor_of(s) ^ _checksum.xor_of(c)

    def _flip_known(self, set_positions: Positions, cleared_positions: Positions) -> None:
        """Write bits known (by the caller) to flip: set ones are 0, cleared ones are 1, no duplicates."""
        if set_positions.size:
            _set_bits(self._buf, set_positions)
        if cleared_positions.size:
            _clear_bits(self._buf, cleared_positions)
        if self._checksum is not None:
            self._checksum ^= _checksum.xor_of(set_positions) ^ _checksum.xor_of(cleared_positions)

    # -- statistics ---------------------------------------------------------------------
    def set_count(self) -> int:
        return int(self.bits.count(1))

    def fill(self) -> float:
        return self.set_count() / self.geometry.bits

    def predicted_fpr(self) -> float:
        """fill^k: the chance an absent key finds all k of its bits set."""
        return fill_fpr(self.fill(), self.geometry.hashes)

    def estimated_cardinality(self) -> float:
        """Swamidass & Baldi (2007): n = -(m/k) ln(1 - X/m), X set bits; inf when full."""
        return estimated_cardinality(self.geometry, self.set_count())

    def set_positions(self) -> Positions:
        """Sorted uint64 positions of every set bit."""
        return _positions_of_bytes(self._buf)

    # -- serialisation ------------------------------------------------------------------
    def to_bytes(self) -> bytes:
        """Raw little-endian bit order bytes (the RAW snapshot encoding)."""
        return self.bits.tobytes()

    @classmethod
    def from_bytes(cls, geometry: Geometry, data: bytes) -> BloomFilter:
        """Inverse of to_bytes; ValueError on a wrong length or set padding bits."""
        geometry.validate()
        if len(data) != geometry.byte_size:
            raise ValueError(f"filter bytes have length {len(data)}, geometry m={geometry.bits} needs {geometry.byte_size}")
        spare = geometry.byte_size * 8 - geometry.bits
        if spare and data[-1] >> (8 - spare):
            raise ValueError(f"padding bits after bit {geometry.bits} are set; the bytes do not belong to this geometry")
        bits = bitarray(endian="little")
        bits.frombytes(bytes(data))
        del bits[geometry.bits:]
        return cls(geometry, bits)

    def copy(self) -> BloomFilter:
        clone = BloomFilter(self.geometry, bitarray(self.bits, endian="little"))
        clone._checksum = self._checksum
        return clone

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, BloomFilter):
            return NotImplemented
        return self.geometry == other.geometry and self.bits == other.bits

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return f"BloomFilter({self.geometry}, set={self.set_count()})"


def estimated_cardinality(geometry: Geometry, set_bits: int) -> float:
    """Swamidass & Baldi (2007) estimate of the keys in a filter with set_bits bits set."""
    return estimated_keys(geometry.bits, geometry.hashes, set_bits)


class CountingBloomFilter:
    """A node's filter: one 4-bit saturating counter per bit, two counters per byte.

    A counter that reached 15 is never decremented again (its true count is unknown, and
    lowering it could clear a bit another key still needs: no false negatives). Removing a
    key that was never added is the caller's bug: counters at 0 stay 0 (a counter never
    goes below zero), which may clear bits of other keys that share positions; nodes only
    remove keys their store held.

    The 0/1 view (counter > 0) lives in a BloomFilter with its checksum kept per flipped
    bit. take_changes() returns exactly the bits whose 0/1 state differs from the last call.
    """

    __slots__ = ("geometry", "_counters", "_view", "_flips", "_flip_count", "_baseline")

    def __init__(self, geometry: Geometry) -> None:
        geometry.validate()
        self.geometry = geometry
        self._counters = np.zeros((geometry.bits + 1) // 2, dtype=np.uint8)
        self._view = BloomFilter(geometry)
        # Since the last take_changes: either a log of the positions each operation flipped
        # (cheap for the usual trickle of writes) or, once the log outgrows m/64 entries
        # (m/8 bytes), a copy of the 0/1 bytes as they were at the last take.
        self._flips: list[Positions] = []
        self._flip_count = 0
        self._baseline: npt.NDArray[np.uint8] | None = None

    @property
    def checksum(self) -> int:
        return self._view.checksum

    @property
    def bits(self) -> bitarray:
        """The live 0/1 view (read only: write through add/remove)."""
        return self._view.bits

    # -- updates ------------------------------------------------------------------------
    def add(self, key: bytes | str) -> None:
        self.add_positions(key_positions(key, self.geometry).reshape(1, -1))

    def remove(self, key: bytes | str) -> None:
        self.remove_positions(key_positions(key, self.geometry).reshape(1, -1))

    def add_batch(self, keys: Sequence[bytes | str]) -> None:
        g = self.geometry
        for start in range(0, len(keys), CHUNK_KEYS):
            self.add_positions(positions_from_digests(digests(keys[start:start + CHUNK_KEYS], g.seed), g))

    def remove_batch(self, keys: Sequence[bytes | str]) -> None:
        g = self.geometry
        for start in range(0, len(keys), CHUNK_KEYS):
            self.remove_positions(positions_from_digests(digests(keys[start:start + CHUNK_KEYS], g.seed), g))

    def add_positions(self, pos: Positions) -> None:
        """Count every row of pos (n, k) as one added key."""
        self._update(self._view._check_positions(pos), +1)

    def remove_positions(self, pos: Positions) -> None:
        """Uncount every row of pos (n, k) as one removed key (see the class note on misuse)."""
        self._update(self._view._check_positions(pos), -1)

    def _update(self, pos: Positions, sign: int) -> None:
        if pos.size == 0:
            return
        uniq, counts = _unique_counts(pos)
        went_up: list[Positions] = []
        went_down: list[Positions] = []
        counters = self._counters
        # Even and odd positions live in the low and high nibbles; handling each parity
        # separately keeps the byte indices of one scatter unique.
        for parity in (0, 1):
            sel = (uniq & np.uint64(1)) == parity
            if not sel.any():
                continue
            p = uniq[sel]
            c = counts[sel]
            byte = (p >> np.uint64(1)).astype(np.intp)
            shift = np.uint8(4 * parity)
            old_bytes = counters[byte]
            cur = ((old_bytes >> shift) & np.uint8(0xF)).astype(np.int64)
            if sign > 0:
                new = np.minimum(cur + c, 15)
                went_up.append(p[cur == 0])
            else:
                new = np.where(cur == 15, 15, np.maximum(cur - c, 0))
                went_down.append(p[(cur > 0) & (new == 0)])
            keep_mask = np.uint8(0xF0 if parity == 0 else 0x0F)
            counters[byte] = (old_bytes & keep_mask) | (new.astype(np.uint8) << shift)
        set_pos = np.concatenate(went_up) if went_up else np.zeros(0, dtype=np.uint64)
        cleared_pos = np.concatenate(went_down) if went_down else np.zeros(0, dtype=np.uint64)
        if set_pos.size or cleared_pos.size:
            self._view._flip_known(set_pos, cleared_pos)
            if self._baseline is None:
                self._flips.append(np.concatenate((set_pos, cleared_pos)))
                self._flip_count += set_pos.size + cleared_pos.size
                if self._flip_count > max(_FLIP_LOG_MIN, self.geometry.bits // 64):
                    self._switch_to_baseline()

    def _net_flips(self) -> Positions:
        """Positions flipped an odd number of times since the last take (sorted)."""
        if not self._flips:
            return np.zeros(0, dtype=np.uint64)
        uniq, counts = _unique_counts(np.concatenate(self._flips))
        return uniq[(counts & 1) == 1]

    def _switch_to_baseline(self) -> None:
        """Replace the flip log by the 0/1 bytes as of the last take (current bits, net flips undone)."""
        baseline = self._view._buf.copy()
        net = self._net_flips()
        was_set = _test_bits(baseline, net).astype(np.bool_)
        _clear_bits(baseline, net[was_set])
        _set_bits(baseline, net[~was_set])
        self._baseline = baseline
        self._flips = []
        self._flip_count = 0

    def take_changes(self) -> ChangeSet:
        """The bits whose 0/1 state differs from the previous call (or from empty at creation)."""
        if self._baseline is not None:
            changed = _positions_of_bytes(self._view._buf ^ self._baseline)
            self._baseline = None
        elif self._flips:
            changed = self._net_flips()
            self._flips = []
            self._flip_count = 0
        else:
            return ChangeSet()
        now_set = _test_bits(self._view._buf, changed).astype(np.bool_)
        return ChangeSet(set_positions=changed[now_set], cleared_positions=changed[~now_set])

    # -- queries and statistics -----------------------------------------------------------
    def contains(self, key: bytes | str) -> bool:
        return self._view.contains(key)

    def __contains__(self, key: bytes | str) -> bool:
        return self._view.contains(key)

    def contains_batch(self, keys: Sequence[bytes | str]) -> npt.NDArray[np.bool_]:
        return self._view.contains_batch(keys)

    def contains_positions(self, pos: Positions) -> npt.NDArray[np.bool_]:
        return self._view.contains_positions(pos)

    def counter(self, position: int) -> int:
        """The counter at one position (0..15)."""
        if not 0 <= position < self.geometry.bits:
            raise ValueError(f"position {position} is outside the filter (m = {self.geometry.bits})")
        byte = int(self._counters[position >> 1])
        return (byte >> (4 * (position & 1))) & 0xF

    def bloom(self) -> BloomFilter:
        """A copy of the current 0/1 view, checksum included."""
        return self._view.copy()

    def set_count(self) -> int:
        return self._view.set_count()

    def fill(self) -> float:
        return self._view.fill()

    def predicted_fpr(self) -> float:
        return self._view.predicted_fpr()

    def estimated_cardinality(self) -> float:
        return self._view.estimated_cardinality()

    def saturated_counters(self) -> int:
        """Counters pinned at 15."""
        c = self._counters
        return int(np.count_nonzero((c & 0x0F) == 0x0F) + np.count_nonzero((c >> 4) == 0x0F))

    def saturated_positions(self) -> Positions:
        """Sorted positions whose counter is pinned at 15."""
        c = self._counters
        low = np.flatnonzero((c & 0x0F) == 0x0F).astype(np.uint64) * np.uint64(2)
        high = np.flatnonzero((c >> 4) == 0x0F).astype(np.uint64) * np.uint64(2) + np.uint64(1)
        return np.sort(np.concatenate((low, high)))

    def __repr__(self) -> str:
        return f"CountingBloomFilter({self.geometry}, set={self.set_count()})"
