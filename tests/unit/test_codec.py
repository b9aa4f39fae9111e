"""Delta codec: round trips, the byte layout of docs/wire-formats.md, size against outside
references (entropy bound, Gallager–van Voorhis parameter, zlib/zstd), and one specific
error per kind of bad input."""

from __future__ import annotations

import math
import zlib

import numpy as np
import pytest

from shardsieve import codec
from shardsieve.changeset import ChangeSet
from shardsieve.codec import (
    CodecError,
    CorruptError,
    OutOfRangeError,
    OversizeError,
    TruncatedError,
    VersionError,
    decode_delta,
    decode_positions,
    encode_delta,
    encode_positions,
)

M = 1 << 24


def _positions(values: list[int] | np.ndarray) -> np.ndarray:
    return np.asarray(values, dtype=np.uint64)


def _random_positions(rng: np.random.Generator, bits: int, count: int) -> np.ndarray:
    return np.sort(rng.choice(bits, size=count, replace=False)).astype(np.uint64)


def _varint(value: int) -> bytes:
    out = bytearray()
    while True:
        byte = value & 0x7F
        value >>= 7
        out.append(byte | (0x80 if value else 0))
        if not value:
            return bytes(out)


def _with_crc(without_crc: bytes) -> bytes:
    return without_crc + zlib.crc32(without_crc).to_bytes(4, "little")


# ---------------------------------------------------------------- an independent reference decoder

class _BitReader:
    """Bit-at-a-time reader, most significant bit of each byte first (docs/wire-formats.md)."""

    def __init__(self, data: bytes) -> None:
        self.data = data
        self.pos = 0

    def bit(self) -> int:
        byte = self.data[self.pos // 8]
        value = (byte >> (7 - self.pos % 8)) & 1
        self.pos += 1
        return value


def _reference_body(body: bytes, n: int, r: int) -> list[int]:
    """Decode a Rice body exactly as docs/wire-formats.md words it, one bit at a time."""
    reader = _BitReader(body)
    remainders = []
    for _ in range(n):
        value = 0
        for _ in range(r):
            value = (value << 1) | reader.bit()
        remainders.append(value)
    positions, previous = [], -1
    for rem in remainders:
        q = 0
        while reader.bit() == 0:
            q += 1
        gap = (q << r) | rem
        previous = previous + gap + 1
        positions.append(previous)
    assert (reader.pos + 7) // 8 == len(body)
    return positions


def _reference_delta(payload: bytes) -> tuple[list[int], list[int]]:
    """Parse a v1 delta per the documented layout (no shared code with shardsieve.codec)."""
    assert payload[0] == 1
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

    n_set, n_clr = varint(), varint()
    params = []
    for n in (n_set, n_clr):
        if n:
            r = payload[offset]
            offset += 1
            params.append((n, r, varint()))
        else:
            params.append((0, 0, 0))
    result = []
    for n, r, length in params:
        result.append(_reference_body(payload[offset: offset + length], n, r) if n else [])
        offset += length
    assert zlib.crc32(payload[:offset]) == int.from_bytes(payload[offset:], "little")
    assert offset + 4 == len(payload)
    return result[0], result[1]


# ---------------------------------------------------------------- round trips and layout

@pytest.mark.parametrize("values", [[], [0], [M - 1], [0, M - 1], list(range(64)), list(range(M - 100, M))])
def test_positions_round_trip_edges(values: list[int]) -> None:
    arr = _positions(values)
    assert np.array_equal(decode_positions(encode_positions(arr, M), M), arr)


@pytest.mark.parametrize("bits", [1, 2, 3, 1024, 1 << 40])
def test_positions_round_trip_tiny_and_huge_filters(bits: int) -> None:
    for values in ([], [0], [bits - 1], sorted({0, bits // 2, bits - 1})):
        arr = _positions(values)
        assert np.array_equal(decode_positions(encode_positions(arr, bits), bits), arr)


def test_every_subset_of_a_4_bit_filter_round_trips() -> None:
    for mask in range(16):
        arr = _positions([i for i in range(4) if mask >> i & 1])
        assert np.array_equal(decode_positions(encode_positions(arr, 4), 4), arr)
        changes = ChangeSet(arr, _positions([i for i in range(4) if not mask >> i & 1]))
        assert decode_delta(encode_delta(changes, 4), 4) == changes


def test_delta_round_trip_random_and_matches_reference_decoder() -> None:
    rng = np.random.default_rng(11)
    for bits, density in ((M, 1e-5), (M, 1e-3), (1 << 20, 0.05), (1 << 20, 0.5)):
        both = np.flatnonzero(rng.random(bits) < density).astype(np.uint64)
        mask = rng.random(both.size) < 0.7
        changes = ChangeSet(both[mask], both[~mask])
        payload = encode_delta(changes, bits)
        assert decode_delta(payload, bits) == changes
        if both.size <= 20000:  # the bit-at-a-time reference decoder is slow; small sets suffice
            ref_set, ref_clr = _reference_delta(payload)
            assert ref_set == changes.set_positions.tolist()
            assert ref_clr == changes.cleared_positions.tolist()


def test_hand_derived_golden_payload() -> None:
    # Derived by hand from docs/wire-formats.md for m = 1024, set {3}, cleared {}:
    # r starts at round(log2(ln 2 * 1024 / 1)) = round(9.47) = 9; costs for r = 8, 9, 10 are
    # 1*(r+1) + (3 >> r) = 9, 10, 11 bits, so r = 8. Body: remainder 3 as 8 bits 00000011,
    # unary q = 0 -> "1", padding -> 0x03 0x80 (2 bytes).
    head = bytes([0x01, 0x01, 0x00, 0x08, 0x02, 0x03, 0x80])
    assert encode_delta(ChangeSet.of([3]), 1024) == _with_crc(head)
    assert encode_positions(_positions([3]), 1024) == bytes([0x01, 0x08, 0x03, 0x80])


def test_empty_delta_is_seven_bytes_and_small_deltas_stay_small() -> None:
    assert encode_delta(ChangeSet(), M) == _with_crc(bytes([1, 0, 0]))
    # one position in 2^24 bits: 3 header + r + length + ceil((24 + 1) / 8) body + 4 CRC
    assert len(encode_delta(ChangeSet.of([M - 1]), M)) <= 3 + 2 + 4 + 4


def test_encoder_rejects_bad_input_with_value_error() -> None:
    with pytest.raises(ValueError, match="sorted"):
        encode_positions(_positions([5, 3]), M)
    with pytest.raises(ValueError, match="sorted"):
        encode_positions(_positions([3, 3]), M)
    with pytest.raises(ValueError, match="out of range"):
        encode_positions(_positions([M]), M)
    with pytest.raises(ValueError, match="non-negative"):
        encode_positions(np.array([-1, 2]), M)
    with pytest.raises(ValueError, match="bits"):
        encode_positions(_positions([1]), 0)
    with pytest.raises(ValueError, match="both set and cleared"):
        encode_delta(ChangeSet(_positions([1, 2]), _positions([2, 3])), M)


# ---------------------------------------------------------------- outside references

def _gvv_golomb_divisor(p: float) -> int:
    """Gallager & van Voorhis (1975), eq. for the optimal Golomb parameter of a geometric
    source with theta = 1 - p: the b with theta^b + theta^(b+1) <= 1 < theta^(b-1) + theta^b,
    i.e. b = ceil(log(1 + theta) / -log(theta))."""
    theta = 1.0 - p
    return math.ceil(math.log(1 + theta) / -math.log(theta))


@pytest.mark.parametrize("density", [1e-5, 1e-4, 1e-3, 1e-2, 0.05])
def test_rice_parameter_is_the_power_of_two_nearest_the_gvv_divisor(density: float) -> None:
    b = _gvv_golomb_divisor(density)
    r = codec.rice_parameter_estimate(round(density * M), M)
    # Gallager & van Voorhis (1975): the Rice code uses 2^r in place of b; ours is the nearest
    # power of two in log scale (half a binade, plus rounding of b itself).
    assert abs(r - math.log2(b)) <= 0.5 + 0.05


def test_entropy_bound_matches_exact_binomial() -> None:
    # log2 C(m, d) via lgamma against exact integer arithmetic (math.comb), small m.
    for m, d in ((1000, 0), (1000, 1), (1000, 37), (4096, 2048)):
        assert codec.entropy_bound_bits(d, m) == pytest.approx(math.log2(math.comb(m, d)), rel=1e-9, abs=1e-6)


@pytest.mark.parametrize("density", [1e-4, 1e-3, 1e-2])
def test_size_within_3_percent_of_entropy_bound(density: float) -> None:
    rng = np.random.default_rng(3)
    d = round(density * M)
    payload = encode_delta(ChangeSet(_random_positions(rng, M, d), _positions([])), M)
    # Entropy bound: log2 C(m, d) bits for a uniform d-subset of m (Shannon source coding /
    # Kraft–McMillan; Cover & Thomas, "Elements of Information Theory", ch. 5). Our target, <= 1.03x,
    # is the one README.md "Benchmarks" states.
    assert 8 * len(payload) <= 1.03 * codec.entropy_bound_bits(d, M)


@pytest.mark.parametrize("density", [1e-4, 1e-3, 1e-2])
def test_smaller_than_zlib_and_zstd_of_the_gap_array(density: float) -> None:
    zstandard = pytest.importorskip("zstandard")
    rng = np.random.default_rng(5)
    positions = _random_positions(rng, M, round(density * M))
    ours = len(encode_delta(ChangeSet(positions, _positions([])), M))
    gaps = codec.gaps_of(positions).astype("<u4").tobytes()
    # Reference compressors: zlib level 9 (RFC 1950/1951, Python stdlib) and zstd level 19
    # (zstandard package) of the same gaps as little-endian uint32. Our target, <= 0.85x
    # zstd, is the one README.md "Benchmarks" states.
    assert ours < len(zlib.compress(gaps, 9))
    assert ours <= 0.85 * len(zstandard.ZstdCompressor(level=19).compress(gaps))


# ---------------------------------------------------------------- errors, one per kind

@pytest.fixture
def payload() -> bytes:
    return encode_delta(ChangeSet.of([1, 500, 70000, M - 1], [2, 9999]), M)


def test_truncated_at_every_length(payload: bytes) -> None:
    for length in range(len(payload)):
        with pytest.raises(TruncatedError):
            decode_delta(payload[:length], M)


@pytest.mark.parametrize("version", [0, 2, 0x7F, 0xFF])
def test_wrong_version(payload: bytes, version: int) -> None:
    with pytest.raises(VersionError, match="version"):
        decode_delta(bytes([version]) + payload[1:], M)


def test_trailing_bytes_are_corrupt(payload: bytes) -> None:
    with pytest.raises(CorruptError, match="trailing"):
        decode_delta(payload + b"\x00", M)


def test_crc_mismatch_is_corrupt(payload: bytes) -> None:
    altered = bytearray(payload)
    altered[-6] ^= 0x10  # inside the last body
    with pytest.raises(CorruptError, match="CRC"):
        decode_delta(bytes(altered), M)


def test_every_single_bit_flip_raises(payload: bytes) -> None:
    # CRC-32 detects all single-bit errors (Peterson & Brown, "Cyclic codes for error
    # detection", Proc. IRE 1961): no flip may decode.
    for bit in range(8 * len(payload)):
        altered = bytearray(payload)
        altered[bit // 8] ^= 1 << (bit % 8)
        with pytest.raises(CodecError) as info:
            decode_delta(bytes(altered), M)
        # which specific error depends on the field hit; never the bare base class
        assert type(info.value) in (TruncatedError, VersionError, OutOfRangeError, CorruptError), type(info.value)


def test_count_larger_than_filter_is_out_of_range() -> None:
    with pytest.raises(OutOfRangeError, match="exceeds the filter size"):
        decode_delta(_with_crc(bytes([1]) + _varint(1025) + bytes([0])), 1024)
    with pytest.raises(OutOfRangeError, match="exceed the filter size"):
        decode_delta(_with_crc(bytes([1]) + _varint(600) + _varint(600)), 1024)


def test_varint_over_64_bits_is_out_of_range() -> None:
    with pytest.raises(OutOfRangeError, match="64 bits"):
        decode_delta(_with_crc(bytes([1]) + b"\xff" * 9 + b"\x7f" + bytes([0])), M)


def test_non_minimal_varint_is_corrupt() -> None:
    with pytest.raises(CorruptError, match="minimally"):
        decode_delta(_with_crc(bytes([1, 0x80, 0x00, 0x00])), M)


def test_position_beyond_m_is_out_of_range() -> None:
    payload = encode_delta(ChangeSet.of([5, 2000]), 4096)
    with pytest.raises(OutOfRangeError, match="out of range|past the end"):
        decode_delta(payload, 1024)


def test_max_positions_is_oversize(payload: bytes) -> None:
    assert len(decode_delta(payload, M, max_positions=6)) == 6
    with pytest.raises(OversizeError, match="allowed"):
        decode_delta(payload, M, max_positions=5)
    with pytest.raises(OversizeError):
        decode_positions(encode_positions(_positions([1, 2, 3]), M), M, max_positions=2)


def test_max_bytes_is_oversize(payload: bytes) -> None:
    assert len(decode_delta(payload, M, max_bytes=len(payload))) == 6
    with pytest.raises(OversizeError, match="bytes"):
        decode_delta(payload, M, max_bytes=len(payload) - 1)
    block = encode_positions(_positions([1, 2, 3]), M)
    with pytest.raises(OversizeError, match="bytes"):
        decode_positions(block, M, max_bytes=len(block) - 1)


def test_rice_parameter_too_large_is_corrupt() -> None:
    # m = 1024 needs at most 10 remainder bits
    with pytest.raises(CorruptError, match="Rice parameter 11"):
        decode_delta(_with_crc(bytes([1, 1, 0, 11, 2, 0, 0x10])), 1024)


def test_body_length_too_small_is_corrupt() -> None:
    with pytest.raises(CorruptError, match="too small"):
        decode_delta(_with_crc(bytes([1, 4, 0, 8, 1, 0])), 1024)


def test_nonzero_padding_is_corrupt() -> None:
    # set {3} in m = 1024 with r = 8: body 0x03 0x80; 0x81 sets a padding bit
    with pytest.raises(CorruptError, match="padding"):
        decode_delta(_with_crc(bytes([1, 1, 0, 8, 2, 0x03, 0x81])), 1024)


def test_position_both_set_and_cleared_is_corrupt() -> None:
    with pytest.raises(CorruptError, match="both set and cleared"):
        decode_delta(_with_crc(bytes([1, 1, 1, 8, 2, 8, 2, 0x03, 0x80, 0x03, 0x80])), 1024)


def test_positions_block_errors() -> None:
    good = encode_positions(_positions([1, 7, 900]), 1024)
    for length in range(len(good)):
        with pytest.raises(TruncatedError):
            decode_positions(good[:length], 1024)
    with pytest.raises(CorruptError, match="trailing"):
        decode_positions(good + b"\x00", 1024)
    with pytest.raises(CorruptError, match="trailing"):
        decode_positions(b"\x00\x00", 1024)
    with pytest.raises(OutOfRangeError):
        decode_positions(_varint(2000), 1024)


def test_decode_does_not_modify_its_input(payload: bytes) -> None:
    buffer = bytearray(payload)
    decode_delta(buffer, M)
    assert bytes(buffer) == payload
