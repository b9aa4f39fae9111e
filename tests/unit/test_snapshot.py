"""Snapshots: encoding choice against zlib as the reference compressor, chunked round trips
for each encoding, arrival order, duplicates, and one specific error per inconsistency."""

from __future__ import annotations

import random
import zlib

import numpy as np
import pytest

from shardsieve import codec
from shardsieve.bloom import BloomFilter
from shardsieve.changeset import ChangeSet
from shardsieve.codec import CodecError, OversizeError
from shardsieve.geometry import Geometry
from shardsieve.snapshot import (
    ENCODING_POSITIONS,
    ENCODING_RAW,
    ENCODING_ZLIB,
    MAX_CHUNK_BYTES,
    ChunkConflictError,
    ChunkIndexError,
    ChunkSizeError,
    EncodedSnapshot,
    SnapshotAssembler,
    SnapshotChecksumError,
    SnapshotCorruptError,
    SnapshotError,
    SnapshotIncompleteError,
    SnapshotLayoutError,
    SnapshotOversizeError,
    encode_snapshot,
)

G = Geometry(bits=1 << 16, hashes=5)


def _filter_with_fill(geometry: Geometry, fill: float, seed: int = 1) -> BloomFilter:
    rng = np.random.default_rng(seed)
    count = round(fill * geometry.bits)
    positions = np.sort(rng.choice(geometry.bits, size=count, replace=False)).astype(np.uint64)
    bloom = BloomFilter(geometry)
    bloom.apply(ChangeSet(positions, np.zeros(0, dtype=np.uint64)))
    return bloom


def _assembler_for(bloom: BloomFilter, snap: EncodedSnapshot, **overrides: int) -> SnapshotAssembler:
    args = dict(encoding=snap.encoding, chunk_count=len(snap.chunks), total_bytes=snap.total_bytes,
                checksum=bloom.checksum)
    args.update(overrides)
    return SnapshotAssembler(bloom.geometry, **args)


def _manual(encoding: int, bloom: BloomFilter, chunk: int) -> EncodedSnapshot:
    """Encode with a given encoding regardless of which is smallest."""
    if encoding == ENCODING_RAW:
        data = bloom.to_bytes()
    elif encoding == ENCODING_ZLIB:
        data = zlib.compress(bloom.to_bytes(), 9)
    else:
        data = codec.encode_positions(bloom.set_positions(), bloom.geometry.bits)
    return EncodedSnapshot(encoding, len(data), [data[i: i + chunk] for i in range(0, len(data), chunk)])


@pytest.mark.parametrize("fill, expected", [(0.0, ENCODING_POSITIONS), (0.001, ENCODING_POSITIONS),
                                            (0.5, ENCODING_RAW), (0.97, ENCODING_ZLIB)])
def test_encoder_picks_the_smallest(fill: float, expected: int) -> None:
    bloom = _filter_with_fill(G, fill)
    snap = encode_snapshot(bloom)
    raw = bloom.to_bytes()
    candidates = {ENCODING_RAW: len(raw),
                  # zlib (RFC 1950, Python stdlib) as the reference general-purpose compressor
                  ENCODING_ZLIB: len(zlib.compress(raw, 6)),
                  ENCODING_POSITIONS: len(codec.encode_positions(bloom.set_positions(), G.bits))}
    assert snap.encoding == expected
    assert snap.total_bytes == min(candidates.values()) == candidates[expected]
    assert snap.total_bytes == sum(len(c) for c in snap.chunks)


@pytest.mark.parametrize("encoding", [ENCODING_RAW, ENCODING_ZLIB, ENCODING_POSITIONS])
@pytest.mark.parametrize("fill", [0.0, 0.01, 0.5])
def test_round_trip_each_encoding_multi_chunk_any_order(encoding: int, fill: float) -> None:
    bloom = _filter_with_fill(G, fill, seed=2)
    snap = _manual(encoding, bloom, chunk=97)
    if snap.total_bytes > G.byte_size:
        # the format forbids a compressed encoding larger than RAW (docs/wire-formats.md)
        with pytest.raises(SnapshotLayoutError, match="never larger than RAW"):
            _assembler_for(bloom, snap)
        return
    asm = _assembler_for(bloom, snap)
    order = list(range(len(snap.chunks)))
    random.Random(4).shuffle(order)
    for index in order:
        assert not asm.complete
        asm.add(index, snap.chunks[index])
    assert asm.complete
    rebuilt = asm.finish()
    assert rebuilt == bloom
    assert rebuilt.checksum == bloom.checksum
    assert np.array_equal(rebuilt.set_positions(), bloom.set_positions())


def test_encode_snapshot_respects_max_chunk_bytes() -> None:
    bloom = _filter_with_fill(G, 0.5, seed=3)
    snap = encode_snapshot(bloom, max_chunk_bytes=1000)
    assert len(snap.chunks) == -(-snap.total_bytes // 1000)
    assert all(1 <= len(c) <= 1000 for c in snap.chunks)
    asm = _assembler_for(bloom, snap)
    for index in reversed(range(len(snap.chunks))):
        asm.add(index, snap.chunks[index])
    assert asm.finish() == bloom
    with pytest.raises(ValueError, match="max_chunk_bytes"):
        encode_snapshot(bloom, max_chunk_bytes=MAX_CHUNK_BYTES + 1)


def test_large_filter_splits_at_one_mebibyte() -> None:
    geometry = Geometry(bits=1 << 24, hashes=7)
    bloom = BloomFilter.from_bytes(geometry, np.random.default_rng(4).bytes(geometry.byte_size))  # fill ~ 1/2
    snap = encode_snapshot(bloom)
    assert snap.encoding == ENCODING_RAW
    # snapshot chunks are at most 1 MiB (docs/wire-formats.md, "Snapshots") (a literal, so the limit cannot drift)
    assert MAX_CHUNK_BYTES == 1 << 20
    assert all(len(c) <= 1 << 20 for c in snap.chunks)
    assert [len(c) for c in snap.chunks] == [1 << 20, 1 << 20]      # 2 MiB of RAW filter bytes


def test_duplicates_missing_and_conflicts() -> None:
    bloom = _filter_with_fill(G, 0.01)
    snap = _manual(ENCODING_POSITIONS, bloom, chunk=50)
    assert len(snap.chunks) >= 3
    asm = _assembler_for(bloom, snap)
    asm.add(0, snap.chunks[0])
    asm.add(0, snap.chunks[0])  # exact duplicate: ignored
    assert asm.received == 1
    with pytest.raises(ChunkConflictError):
        asm.add(0, snap.chunks[1][: len(snap.chunks[0])])
    for index in range(1, len(snap.chunks) - 1):
        asm.add(index, snap.chunks[index])
    assert not asm.complete
    assert asm.missing == [len(snap.chunks) - 1]
    with pytest.raises(SnapshotIncompleteError, match="missing"):
        asm.finish()
    asm.add(len(snap.chunks) - 1, snap.chunks[-1])
    assert asm.finish() == bloom


def test_wrong_checksum() -> None:
    bloom = _filter_with_fill(G, 0.01)
    snap = encode_snapshot(bloom)
    asm = _assembler_for(bloom, snap, checksum=bloom.checksum ^ 1)
    for index, chunk in enumerate(snap.chunks):
        asm.add(index, chunk)
    with pytest.raises(SnapshotChecksumError, match="differs"):
        asm.finish()


def test_error_hierarchy() -> None:
    assert issubclass(SnapshotError, CodecError)
    assert issubclass(SnapshotChecksumError, SnapshotError)
    assert issubclass(SnapshotOversizeError, OversizeError)


@pytest.mark.parametrize("overrides, match", [
    (dict(encoding=ENCODING_RAW, total_bytes=G.byte_size - 1, chunk_count=1), "exactly"),
    (dict(encoding=ENCODING_RAW, total_bytes=G.byte_size + 1, chunk_count=1), "exactly"),
    (dict(encoding=ENCODING_ZLIB, total_bytes=G.byte_size + 1, chunk_count=1), "never larger than RAW"),
    (dict(encoding=ENCODING_POSITIONS, total_bytes=0, chunk_count=1), "1.."),
    (dict(encoding=0, total_bytes=10, chunk_count=1), "unknown"),
    (dict(encoding=9, total_bytes=10, chunk_count=1), "unknown"),
    (dict(encoding=ENCODING_ZLIB, total_bytes=10, chunk_count=0), "chunk_count"),
    (dict(encoding=ENCODING_ZLIB, total_bytes=10, chunk_count=11), "chunk_count"),
    (dict(encoding=ENCODING_ZLIB, total_bytes=10, chunk_count=-1), "non-negative"),
    (dict(encoding=ENCODING_ZLIB, total_bytes=10, chunk_count=1, checksum=1 << 64), "64 bits"),
])
def test_declared_layout_inconsistent(overrides: dict, match: str) -> None:
    args = dict(checksum=0)
    args.update(overrides)
    with pytest.raises(SnapshotLayoutError, match=match):
        SnapshotAssembler(G, **args)


def test_declared_layout_against_chunk_limit_and_geometry() -> None:
    big = Geometry(bits=1 << 24, hashes=7)
    with pytest.raises(SnapshotLayoutError, match="cannot carry"):
        SnapshotAssembler(big, encoding=ENCODING_RAW, chunk_count=1, total_bytes=big.byte_size, checksum=0)
    with pytest.raises(SnapshotLayoutError, match="geometry"):
        SnapshotAssembler(Geometry(bits=100, hashes=3), encoding=ENCODING_RAW, chunk_count=1, total_bytes=13,
                          checksum=0)
    with pytest.raises(SnapshotOversizeError, match="limit"):
        SnapshotAssembler(G, encoding=ENCODING_RAW, chunk_count=1, total_bytes=G.byte_size, checksum=0,
                          max_total_bytes=G.byte_size - 1)


def test_chunk_errors_leave_state_unchanged() -> None:
    big = Geometry(bits=1 << 24, hashes=7)
    asm = SnapshotAssembler(big, encoding=ENCODING_RAW, chunk_count=3, total_bytes=big.byte_size, checksum=0)
    with pytest.raises(ChunkIndexError):
        asm.add(3, b"x")
    with pytest.raises(ChunkIndexError):
        asm.add(-1, b"x")
    with pytest.raises(ChunkSizeError, match="1.."):
        asm.add(0, b"")
    with pytest.raises(ChunkSizeError, match="1.."):
        asm.add(0, bytes(MAX_CHUNK_BYTES + 1))
    asm.add(0, bytes(MAX_CHUNK_BYTES))
    asm.add(1, bytes(MAX_CHUNK_BYTES - 10))
    with pytest.raises(ChunkSizeError, match="leaves the snapshot"):
        asm.add(2, bytes(5))
    assert asm.received == 2 and asm.missing == [2]
    small = SnapshotAssembler(G, encoding=ENCODING_RAW, chunk_count=3, total_bytes=G.byte_size, checksum=0)
    small.add(0, bytes(G.byte_size - 2))
    with pytest.raises(ChunkSizeError, match="overflow"):
        small.add(1, bytes(2))  # would leave nothing for chunk 2
    assert small.received == 1


def _assemble(encoding: int, data: bytes, checksum: int = 0) -> BloomFilter:
    asm = SnapshotAssembler(G, encoding=encoding, chunk_count=1, total_bytes=len(data), checksum=checksum)
    asm.add(0, data)
    return asm.finish()


def test_corrupt_payloads() -> None:
    with pytest.raises(SnapshotCorruptError, match="inflate"):
        _assemble(ENCODING_ZLIB, b"not zlib at all")
    raw = bytes(G.byte_size)
    packed = zlib.compress(raw)
    with pytest.raises(SnapshotCorruptError, match="truncated"):
        _assemble(ENCODING_ZLIB, packed[:-3])
    # a stream that inflates past the filter size stops at byte_size + 1
    with pytest.raises(SnapshotCorruptError):
        _assemble(ENCODING_ZLIB, zlib.compress(bytes(100 * G.byte_size)))
    with pytest.raises(SnapshotCorruptError, match="expected"):
        _assemble(ENCODING_ZLIB, zlib.compress(bytes(G.byte_size - 1)))
    with pytest.raises(SnapshotCorruptError, match="trailing"):
        _assemble(ENCODING_ZLIB, packed + b"\x00")
    with pytest.raises(SnapshotCorruptError, match="does not decode"):
        _assemble(ENCODING_POSITIONS, codec.encode_positions(np.array([1, 5], dtype=np.uint64), G.bits) + b"\x01")
    with pytest.raises(SnapshotCorruptError, match="does not decode"):
        _assemble(ENCODING_POSITIONS, codec.encode_positions(np.array([1, G.bits + 5], dtype=np.uint64),
                                                             G.bits * 2))
    assert _assemble(ENCODING_ZLIB, packed) == BloomFilter(G)
