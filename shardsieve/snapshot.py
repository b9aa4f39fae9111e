"""Snapshots: a whole filter encoded once, cut into chunks of at most 1 MiB, reassembled.

The sender picks the smallest of three encodings (RAW bit-vector bytes, zlib of those
bytes, or the sparse positions block of shardsieve.codec), so a nearly empty or nearly
full filter travels small and a half-full one (incompressible) travels raw. Compressed
encodings are used only when they are smaller than RAW; the receiver relies on that rule
to bound memory before a single chunk arrives (docs/wire-formats.md, "Snapshot").

The assembler is a plain object: chunks in (any order, duplicates allowed), one verified
BloomFilter out, or a specific SnapshotError and nothing at all.
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

from shardsieve import codec
from shardsieve.codec import CodecError, OversizeError
from shardsieve.v1 import filter_pb2

if TYPE_CHECKING:  # pragma: no cover
    from shardsieve.bloom import BloomFilter
    from shardsieve.geometry import Geometry

MAX_CHUNK_BYTES = 1 << 20
MAX_CHUNK_COUNT = 1 << 20  # 2^40 bits raw = 2^37 bytes = 2^17 MiB chunks; generous headroom

ENCODING_RAW = filter_pb2.SNAPSHOT_ENCODING_RAW
ENCODING_ZLIB = filter_pb2.SNAPSHOT_ENCODING_ZLIB
ENCODING_POSITIONS = filter_pb2.SNAPSHOT_ENCODING_POSITIONS
ENCODINGS = frozenset({ENCODING_RAW, ENCODING_ZLIB, ENCODING_POSITIONS})
ZLIB_LEVEL = 6  # zlib's own default: most of the gain of level 9 at a fraction of the time


class SnapshotError(CodecError):
    """Base of every snapshot failure."""


class SnapshotLayoutError(SnapshotError):
    """Declared encoding / sizes / chunk count are inconsistent with the geometry or each other."""


class SnapshotOversizeError(SnapshotError, OversizeError):
    """The snapshot is larger than the receiver allows."""


class ChunkIndexError(SnapshotError):
    """A chunk index outside 0 .. chunk_count-1."""


class ChunkSizeError(SnapshotError):
    """A chunk is empty, larger than MAX_CHUNK_BYTES, or would overflow the declared total."""


class ChunkConflictError(SnapshotError):
    """A chunk index arrived twice with different bytes."""


class SnapshotIncompleteError(SnapshotError):
    """finish() called before every chunk arrived."""


class SnapshotCorruptError(SnapshotError):
    """The assembled bytes do not decode under the declared encoding."""


class SnapshotChecksumError(SnapshotError):
    """The rebuilt filter's checksum differs from the declared one."""


@dataclass(frozen=True)
class EncodedSnapshot:
    """One encoded filter: the SnapshotEncoding value, the encoded size, and its chunks."""

    encoding: int
    total_bytes: int
    chunks: list[bytes]

    @property
    def chunk_count(self) -> int:
        return len(self.chunks)


def _zlib_worth_trying(fill: float) -> bool:
    """zlib can only win when the bits are skewed: the binary entropy H(fill) bounds any
    order-0 coder (Shannon 1948). A Bloom filter near its design fill of 1/2 has H ≈ 1."""
    if fill <= 0.0 or fill >= 1.0:
        return True
    h = -(fill * np.log2(fill) + (1 - fill) * np.log2(1 - fill))
    return bool(h < 0.9)


def encode_snapshot(bloom: BloomFilter, *, max_chunk_bytes: int = MAX_CHUNK_BYTES) -> EncodedSnapshot:
    """Encode with the smallest of RAW / ZLIB / POSITIONS and cut into chunks.

    Ties go to the simpler encoding (RAW, then POSITIONS, then ZLIB are compared in that order).
    """
    if isinstance(max_chunk_bytes, bool) or not isinstance(max_chunk_bytes, int) \
            or not 1 <= max_chunk_bytes <= MAX_CHUNK_BYTES:
        raise ValueError(f"max_chunk_bytes must be between 1 and {MAX_CHUNK_BYTES}, got {max_chunk_bytes!r}")
    geometry = bloom.geometry
    raw = bloom.to_bytes()
    best_encoding, best = ENCODING_RAW, raw
    count = bloom.set_count()
    # On a pseudo-random filter no code beats log2 C(m, d) bits, and Rice coding spends a few
    # percent more: skip listing the positions when the bound is already near raw size
    if codec.entropy_bound_bits(count, geometry.bits) < 0.97 * 8 * len(raw):
        sparse = codec.encode_positions(bloom.set_positions(), geometry.bits)
        if len(sparse) < len(best):
            best_encoding, best = ENCODING_POSITIONS, sparse
    if _zlib_worth_trying(count / geometry.bits):
        packed = zlib.compress(raw, ZLIB_LEVEL)
        if len(packed) < len(best):
            best_encoding, best = ENCODING_ZLIB, packed
    chunks = [best[i: i + max_chunk_bytes] for i in range(0, len(best), max_chunk_bytes)]  # best is never empty
    return EncodedSnapshot(encoding=int(best_encoding), total_bytes=len(best), chunks=chunks)


def _bytes_from_positions(positions: npt.NDArray[np.uint64], byte_size: int) -> bytes:
    """Little-endian bit order bytes (bit p lives in byte p >> 3 at bit p & 7), built in O(d)."""
    buf = np.zeros(byte_size, dtype=np.uint8)
    if positions.size:
        byte_index = (positions >> np.uint64(3)).astype(np.intp)
        masks = np.left_shift(np.uint8(1), (positions & np.uint64(7)).astype(np.uint8))
        starts = np.flatnonzero(np.r_[True, byte_index[1:] != byte_index[:-1]])
        buf[byte_index[starts]] = np.bitwise_or.reduceat(masks, starts)
    return buf.tobytes()


class SnapshotAssembler:
    """Collects the chunks of one snapshot and rebuilds the filter once all arrived."""

    def __init__(self, geometry: Geometry, *, encoding: int, chunk_count: int, total_bytes: int,
                 checksum: int, max_total_bytes: int | None = None) -> None:
        from shardsieve.geometry import GeometryError

        try:
            geometry.validate()
        except GeometryError as exc:
            raise SnapshotLayoutError(f"snapshot geometry is invalid: {exc}") from exc
        for name, value in (("chunk_count", chunk_count), ("total_bytes", total_bytes), ("checksum", checksum)):
            if isinstance(value, bool) or not isinstance(value, int) or value < 0:
                raise SnapshotLayoutError(f"snapshot {name} must be a non-negative integer, got {value!r}")
        if checksum >= 1 << 64:
            raise SnapshotLayoutError(f"snapshot checksum {checksum} does not fit in 64 bits")
        if encoding not in ENCODINGS:
            raise SnapshotLayoutError(
                f"snapshot encoding {encoding!r} is unknown; expected RAW ({ENCODING_RAW}), "
                f"ZLIB ({ENCODING_ZLIB}) or POSITIONS ({ENCODING_POSITIONS})")
        raw_size = geometry.byte_size
        if encoding == ENCODING_RAW and total_bytes != raw_size:
            raise SnapshotLayoutError(
                f"a RAW snapshot of a {geometry.bits}-bit filter is exactly {raw_size} bytes, declared {total_bytes}")
        if encoding != ENCODING_RAW and not 1 <= total_bytes <= raw_size:
            raise SnapshotLayoutError(
                f"a compressed snapshot must be 1..{raw_size} bytes (never larger than RAW), declared {total_bytes}")
        if max_total_bytes is not None and total_bytes > max_total_bytes:
            raise SnapshotOversizeError(
                f"snapshot of {total_bytes} bytes exceeds the receiver's limit of {max_total_bytes} bytes")
        if not 1 <= chunk_count <= min(total_bytes, MAX_CHUNK_COUNT):
            raise SnapshotLayoutError(
                f"chunk_count {chunk_count} must be between 1 and min(total_bytes={total_bytes}, {MAX_CHUNK_COUNT})")
        if chunk_count * MAX_CHUNK_BYTES < total_bytes:
            raise SnapshotLayoutError(
                f"{chunk_count} chunks of at most {MAX_CHUNK_BYTES} bytes cannot carry {total_bytes} bytes")
        self.geometry = geometry
        self.encoding = int(encoding)
        self.chunk_count = chunk_count
        self.total_bytes = total_bytes
        self.checksum = checksum
        self._chunks: dict[int, bytes] = {}
        self._received_bytes = 0

    @property
    def received(self) -> int:
        """Number of distinct chunks held."""
        return len(self._chunks)

    @property
    def missing(self) -> list[int]:
        """Chunk indexes still awaited, ascending."""
        return [i for i in range(self.chunk_count) if i not in self._chunks]

    def add(self, index: int, data: bytes) -> None:
        """Store one chunk; a byte-identical repeat is ignored, anything inconsistent raises
        and leaves the assembler as it was."""
        if isinstance(index, bool) or not isinstance(index, int) or not 0 <= index < self.chunk_count:
            raise ChunkIndexError(f"chunk index {index!r} is outside 0..{self.chunk_count - 1}")
        data = bytes(data)
        held = self._chunks.get(index)
        if held is not None:
            if held == data:
                return
            raise ChunkConflictError(f"chunk {index} arrived twice with different bytes ({len(held)} vs {len(data)})")
        if not 1 <= len(data) <= MAX_CHUNK_BYTES:
            raise ChunkSizeError(f"chunk {index} is {len(data)} bytes; chunks are 1..{MAX_CHUNK_BYTES} bytes")
        still_missing = self.chunk_count - len(self._chunks) - 1  # each of them needs at least one byte
        if self._received_bytes + len(data) + still_missing > self.total_bytes:
            raise ChunkSizeError(
                f"chunk {index} ({len(data)} bytes) would overflow the declared total of {self.total_bytes} bytes")
        if still_missing == 0 and self._received_bytes + len(data) != self.total_bytes:
            raise ChunkSizeError(
                f"last chunk {index} leaves the snapshot at {self._received_bytes + len(data)} bytes, "
                f"declared {self.total_bytes}")
        self._chunks[index] = data
        self._received_bytes += len(data)

    @property
    def complete(self) -> bool:
        return len(self._chunks) == self.chunk_count

    def finish(self) -> BloomFilter:
        """Decode, rebuild and verify; returns the filter or raises without side effects."""
        from shardsieve.bloom import BloomFilter

        if not self.complete:
            raise SnapshotIncompleteError(
                f"snapshot has {len(self._chunks)} of {self.chunk_count} chunks; missing {self.missing[:8]}")
        data = b"".join(self._chunks[i] for i in range(self.chunk_count))
        raw = self._decode(data)
        try:
            bloom = BloomFilter.from_bytes(self.geometry, raw)
        except ValueError as exc:
            raise SnapshotCorruptError(f"snapshot bytes do not form a filter: {exc}") from exc
        if bloom.checksum != self.checksum:
            raise SnapshotChecksumError(
                f"rebuilt filter checksum {bloom.checksum:#018x} differs from the declared {self.checksum:#018x}")
        return bloom

    def _decode(self, data: bytes) -> bytes:
        raw_size = self.geometry.byte_size
        if self.encoding == ENCODING_RAW:
            return data
        if self.encoding == ENCODING_ZLIB:
            inflater = zlib.decompressobj()
            try:
                raw = inflater.decompress(data, raw_size + 1)  # bounded: a zip bomb stops at raw_size + 1
            except zlib.error as exc:
                raise SnapshotCorruptError(f"ZLIB snapshot does not inflate: {exc}") from exc
            if not inflater.eof or inflater.unused_data or inflater.unconsumed_tail:
                raise SnapshotCorruptError("ZLIB snapshot is truncated or has trailing bytes")
            if len(raw) != raw_size:
                raise SnapshotCorruptError(f"ZLIB snapshot inflates to {len(raw)} bytes, expected {raw_size}")
            return raw
        try:
            positions = codec.decode_positions(data, self.geometry.bits, max_positions=self.geometry.bits)
        except CodecError as exc:
            raise SnapshotCorruptError(f"POSITIONS snapshot does not decode: {exc}") from exc
        return _bytes_from_positions(positions, raw_size)
