"""Property tests of the delta codec and snapshots: every delta and snapshot round-trips,
every corruption of an encoded delta raises the specific error
(docs/architecture.md#5-bad-input-changes-nothing)."""

from __future__ import annotations

import zlib

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shardsieve import codec
from shardsieve.bloom import BloomFilter
from shardsieve.changeset import ChangeSet
from shardsieve.codec import CodecError, CorruptError, OutOfRangeError, TruncatedError, VersionError
from shardsieve.geometry import Geometry
from shardsieve.snapshot import SnapshotAssembler, encode_snapshot

SPECIFIC_ERRORS = (TruncatedError, VersionError, OutOfRangeError, CorruptError, codec.OversizeError)

SETTINGS = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@st.composite
def position_sets(draw: st.DrawFn, max_bits: int = 1 << 40) -> tuple[int, list[int]]:
    """(m, sorted unique positions < m): empty, single, the ends 0 and m-1, clusters, dense."""
    bits = draw(st.one_of(st.integers(1, 64), st.sampled_from([1024, 4096, 1 << 24, 1 << 32, max_bits]),
                          st.integers(1, max_bits)))
    kind = draw(st.sampled_from(["sparse", "dense", "ends", "run"]))
    if kind == "dense" and bits <= 4096:
        values = draw(st.sets(st.integers(0, bits - 1), max_size=bits))
    elif kind == "ends":
        values = {0, bits - 1} | draw(st.sets(st.integers(0, bits - 1), max_size=5))
    elif kind == "run":
        start = draw(st.integers(0, bits - 1))
        values = set(range(start, min(bits, start + draw(st.integers(1, 300)))))
    else:
        values = draw(st.sets(st.integers(0, bits - 1), max_size=200))
    return bits, sorted(values)


@st.composite
def change_sets(draw: st.DrawFn) -> tuple[int, ChangeSet]:
    bits, values = draw(position_sets())
    flags = draw(st.lists(st.booleans(), min_size=len(values), max_size=len(values)))
    set_part = [v for v, f in zip(values, flags) if f]
    cleared = [v for v, f in zip(values, flags) if not f]
    return bits, ChangeSet(np.array(set_part, dtype=np.uint64), np.array(cleared, dtype=np.uint64))


@SETTINGS
@given(position_sets())
def test_positions_round_trip(case: tuple[int, list[int]]) -> None:
    bits, values = case
    arr = np.array(values, dtype=np.uint64)
    decoded = codec.decode_positions(codec.encode_positions(arr, bits), bits)
    assert decoded.dtype == np.uint64
    assert decoded.tolist() == values


@SETTINGS
@given(change_sets())
def test_delta_round_trip(case: tuple[int, ChangeSet]) -> None:
    bits, changes = case
    assert codec.decode_delta(codec.encode_delta(changes, bits), bits) == changes


@settings(max_examples=60, deadline=None)
@given(change_sets())
def test_delta_truncated_at_every_length(case: tuple[int, ChangeSet]) -> None:
    bits, changes = case
    payload = codec.encode_delta(changes, bits)
    for length in range(len(payload)):
        try:
            codec.decode_delta(payload[:length], bits)
        except TruncatedError:
            continue
        raise AssertionError(f"truncation to {length} of {len(payload)} bytes did not raise TruncatedError")


@settings(max_examples=40, deadline=None)
@given(change_sets())
def test_delta_every_single_bit_flip_raises(case: tuple[int, ChangeSet]) -> None:
    bits, changes = case
    payload = codec.encode_delta(changes, bits)
    # CRC-32 detects every single-bit error (Peterson & Brown, Proc. IRE 49(1), 1961), so
    # every flip raises; which error depends on the field the flip lands in.
    flips = range(8 * len(payload)) if len(payload) <= 256 else range(0, 8 * len(payload), 7)
    for bit in flips:
        altered = bytearray(payload)
        altered[bit // 8] ^= 1 << (bit % 8)
        try:
            codec.decode_delta(bytes(altered), bits)
        except (VersionError, CorruptError, TruncatedError, OutOfRangeError):
            continue
        raise AssertionError(f"flip of bit {bit} decoded without error")


@SETTINGS
@given(change_sets(), st.integers(0, 255).filter(lambda v: v != codec.DELTA_FORMAT_VERSION))
def test_delta_bad_version_byte(case: tuple[int, ChangeSet], version: int) -> None:
    bits, changes = case
    payload = codec.encode_delta(changes, bits)
    try:
        codec.decode_delta(bytes([version]) + payload[1:], bits)
    except VersionError:
        return
    raise AssertionError("a wrong version byte decoded")


def _header_length(payload: bytes) -> int:
    """Bytes before the first body, read per docs/wire-formats.md (version, counts, per
    non-empty section a Rice parameter byte and a length varint)."""
    offset = 1

    def varint() -> int:
        nonlocal offset
        value, shift = 0, 0
        while True:
            byte = payload[offset]
            offset += 1
            value |= (byte & 0x7F) << shift
            shift += 7
            if not byte & 0x80:
                return value

    counts = [varint(), varint()]
    for count in counts:
        if count:
            offset += 1
            varint()
    return offset


@SETTINGS
@given(change_sets(), st.integers(0, 1000), st.integers(1, 255))
def test_delta_header_byte_changed_raises(case: tuple[int, ChangeSet], pick: int, xor: int) -> None:
    """Any change to a header byte after the version (counts, Rice parameters, lengths) raises."""
    bits, changes = case
    payload = bytearray(codec.encode_delta(changes, bits))
    header = _header_length(bytes(payload))
    index = 1 + pick % (header - 1)
    payload[index] ^= xor
    try:
        codec.decode_delta(bytes(payload), bits)
    except CodecError as exc:
        # a specific subclass, never the bare base class (docs/architecture.md#5-bad-input-changes-nothing)
        assert type(exc) in SPECIFIC_ERRORS, type(exc)
        return
    raise AssertionError(f"altered header byte {index} of {header} decoded")


@SETTINGS
@given(change_sets(), st.binary(min_size=1, max_size=16))
def test_delta_trailing_bytes(case: tuple[int, ChangeSet], extra: bytes) -> None:
    bits, changes = case
    payload = codec.encode_delta(changes, bits)
    try:
        codec.decode_delta(payload + extra, bits)
    except CorruptError:
        return
    raise AssertionError("trailing bytes were accepted")


@SETTINGS
@given(st.binary(max_size=64), st.sampled_from([1, 1024, 1 << 24]))
def test_arbitrary_bytes_never_crash(data: bytes, bits: int) -> None:
    """Random input either decodes to a valid change set or raises a CodecError; with a
    valid CRC glued on, the same holds past the integrity check."""
    for candidate in (data, bytes([1]) + data + zlib.crc32(bytes([1]) + data).to_bytes(4, "little")):
        try:
            changes = codec.decode_delta(candidate, bits)
        except CodecError:
            continue
        for arr in (changes.set_positions, changes.cleared_positions):
            assert arr.dtype == np.uint64
            assert np.all(arr[1:] > arr[:-1]) and (arr.size == 0 or int(arr[-1]) < bits)
        assert codec.decode_delta(codec.encode_delta(changes, bits), bits) == changes


@settings(max_examples=60, deadline=None)
@given(st.sampled_from([1 << 10, 1 << 13, 1 << 16]), st.data())
def test_snapshot_round_trip_any_chunking_any_order(bits: int, data: st.DataObject) -> None:
    geometry = Geometry(bits=bits, hashes=3)
    fill = data.draw(st.sampled_from([0.0, 0.001, 0.05, 0.5, 0.95, 1.0]))
    seed = data.draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    positions = np.flatnonzero(rng.random(bits) < fill).astype(np.uint64)
    bloom = BloomFilter(geometry)
    bloom.apply(ChangeSet(positions, np.zeros(0, dtype=np.uint64)))
    chunk = data.draw(st.integers(1, geometry.byte_size + 10))
    snap = encode_snapshot(bloom, max_chunk_bytes=chunk)
    assert all(1 <= len(c) <= chunk for c in snap.chunks)
    asm = SnapshotAssembler(geometry, encoding=snap.encoding, chunk_count=len(snap.chunks),
                            total_bytes=snap.total_bytes, checksum=bloom.checksum)
    order = data.draw(st.permutations(range(len(snap.chunks))))
    repeats = data.draw(st.lists(st.integers(0, len(snap.chunks) - 1), max_size=3))
    for index in list(order) + repeats:
        asm.add(index, snap.chunks[index])
    rebuilt = asm.finish()
    assert rebuilt == bloom
    assert rebuilt.set_positions().tolist() == positions.tolist()
