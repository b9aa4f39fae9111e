"""Delta codec: sorted bit positions as Golomb–Rice coded gaps under a versioned header.

Why Golomb–Rice: the positions a change set touches are close to uniformly spread over the
m bits, so the gaps between consecutive positions are close to geometric. For a geometric
source the Golomb code is the optimal prefix code (Gallager & van Voorhis, "Optimal source
codes for geometrically distributed integer alphabets", IEEE Trans. IT 21(2), 1975); its
power-of-two special case, the Rice code, loses very little and needs only shifts.

Layout (docs/wire-formats.md is the normative description): each gap g is split into a
quotient q = g >> r and an r-bit remainder. All remainders are stored first, fixed width,
then all quotients in unary (q zero bits and a terminating one bit). Keeping the two
streams apart costs nothing in size and makes both directions vectorisable: the encoder
scatters bits at cumsum offsets, the decoder finds the unary terminators with one
np.flatnonzero. No Python loop runs per position.

Decoders validate everything and return whole results or raise one of the CodecError
subclasses below; nothing is ever half-decoded.
"""

from __future__ import annotations

import math
import zlib

import numpy as np
import numpy.typing as npt

from shardsieve.changeset import ChangeSet, overlaps

DELTA_FORMAT_VERSION = 1
POSITIONS_FORMAT_VERSION = 1  # the positions block has no version byte of its own; it rides in its container

MAX_RICE_PARAMETER = 63
_MAX_VARINT_BYTES = 10
_U64 = np.uint64
_EMPTY = np.zeros(0, dtype=np.uint64)


class CodecError(ValueError):
    """Base of every decode failure; the message says what was wrong and where."""


class TruncatedError(CodecError):
    """The input ends before the structure its header announces."""


class VersionError(CodecError):
    """The format version byte is not one this build understands."""


class OutOfRangeError(CodecError):
    """A decoded position is >= m, or a header field is outside its bounds."""


class CorruptError(CodecError):
    """Integrity check failed, positions not increasing, trailing bytes, or a bad parameter."""


class OversizeError(CodecError):
    """More positions (or bytes) than the caller allows."""


# --------------------------------------------------------------------------- varints

def write_varint(out: bytearray, value: int) -> None:
    """Unsigned LEB128: 7 bits per byte, least significant group first, high bit = more."""
    if value < 0:
        raise ValueError(f"varint value must be non-negative, got {value}")
    while True:
        byte = value & 0x7F
        value >>= 7
        if value:
            out.append(byte | 0x80)
        else:
            out.append(byte)
            return


def _read_varint(data: bytes | memoryview, offset: int, what: str) -> tuple[int, int]:
    """Read one varint at offset; returns (value, new offset)."""
    value = 0
    shift = 0
    for i in range(_MAX_VARINT_BYTES):
        pos = offset + i
        if pos >= len(data):
            raise TruncatedError(f"input ends inside the {what} field (offset {offset})")
        byte = data[pos]
        value |= (byte & 0x7F) << shift
        if not byte & 0x80:
            if i and byte == 0:
                raise CorruptError(f"the {what} field at offset {offset} is not minimally encoded")
            if value >= 1 << 64:
                raise OutOfRangeError(f"the {what} field at offset {offset} exceeds 64 bits")
            return value, pos + 1
        shift += 7
    raise CorruptError(f"the {what} field at offset {offset} is longer than {_MAX_VARINT_BYTES} bytes")


# --------------------------------------------------------------------------- Rice parameter

def rice_parameter_estimate(count: int, bits: int) -> int:
    """r = round(log2(ln 2 · m / d)): the power of two nearest the Golomb divisor
    b ≈ ln 2 / p that Gallager & van Voorhis (1975) derive for a geometric source with
    success probability p = d / m."""
    if count <= 0:
        return 0
    mean_gap = bits / count
    if mean_gap * math.log(2) <= 1.0:
        return 0
    return min(MAX_RICE_PARAMETER, max(0, round(math.log2(math.log(2) * mean_gap))))


def _coded_bits(gaps: npt.NDArray[np.uint64], r: int) -> int:
    """Exact size in bits of the Rice code of gaps with parameter r."""
    return int(gaps.size) * (r + 1) + int((gaps >> _U64(r)).sum())


def rice_parameter_limit(bits: int) -> int:
    """Largest Rice parameter allowed for an m-bit filter: wider remainders than a position
    needs only waste space, so decoders reject them as a bad parameter."""
    return min(MAX_RICE_PARAMETER, max(1, (bits - 1).bit_length()))


def choose_rice_parameter(gaps: npt.NDArray[np.uint64], bits: int) -> int:
    """Start at the density estimate, then keep the neighbour that codes these gaps in fewer bits.

    The estimate is optimal for truly geometric gaps; checking r-1 and r+1 against the real
    gaps costs three vector passes and never makes the code longer.
    """
    limit = rice_parameter_limit(bits)
    r0 = min(rice_parameter_estimate(int(gaps.size), bits), limit)
    best_r, best_size = r0, _coded_bits(gaps, r0)
    for r in (r0 - 1, r0 + 1):
        if 0 <= r <= limit:
            size = _coded_bits(gaps, r)
            if size < best_size:
                best_r, best_size = r, size
    return best_r


# --------------------------------------------------------------------------- bodies

def _check_positions(positions: npt.ArrayLike, bits: int) -> npt.NDArray[np.uint64]:
    """Encoder-side check: a wrong input is a programming error, raised as ValueError."""
    if isinstance(bits, bool) or not isinstance(bits, int) or bits < 1:
        raise ValueError(f"bits (m) must be a positive integer, got {bits!r}")
    arr = np.asarray(positions)
    if arr.ndim != 1:
        raise ValueError(f"positions must be a one-dimensional array, got shape {arr.shape}")
    if arr.size == 0:
        return _EMPTY
    if arr.dtype.kind not in "ui":
        raise ValueError(f"positions must be integers, got dtype {arr.dtype}")
    if arr.dtype.kind == "i" and int(arr.min()) < 0:
        raise ValueError("positions must be non-negative")
    arr = arr.astype(np.uint64, copy=False)
    if arr.size > 1 and not bool(np.all(arr[1:] > arr[:-1])):
        raise ValueError("positions must be sorted strictly increasing (unique)")
    if int(arr[-1]) >= bits:
        raise ValueError(f"position {int(arr[-1])} is out of range for a filter of {bits} bits")
    return arr


def gaps_of(positions: npt.NDArray[np.uint64]) -> npt.NDArray[np.uint64]:
    """g_0 = p_0, g_i = p_i - p_{i-1} - 1: non-negative because positions strictly increase."""
    gaps = np.empty_like(positions)
    gaps[0] = positions[0]
    np.subtract(positions[1:], positions[:-1], out=gaps[1:])
    gaps[1:] -= _U64(1)
    return gaps


def _word_dtype(r: int) -> str:
    """Smallest big-endian unsigned word holding r bits: fewer bits to unpack per remainder."""
    for width, name in ((8, ">u1"), (16, ">u2"), (32, ">u4")):
        if r <= width:
            return name
    return ">u8"


def _encode_body(gaps: npt.NDArray[np.uint64], r: int) -> bytes:
    """Remainder stream (n·r bits, MSB first) then unary stream, packed MSB-first, zero padded."""
    n = int(gaps.size)
    quotients = (gaps >> _U64(r)).astype(np.intp)
    # terminator of code i sits at (sum of (q_j + 1) for j <= i) - 1 inside the unary stream
    quotients += 1
    terminators = np.cumsum(quotients)
    terminators += n * r - 1
    stream = np.zeros(int(terminators[-1]) + 1, dtype=np.uint8)
    stream[terminators] = 1
    if r:
        dtype = _word_dtype(r)
        width = 8 * np.dtype(dtype).itemsize
        words = (gaps & _U64((1 << r) - 1)).astype(dtype)
        rem_bits = np.unpackbits(words.view(np.uint8)).reshape(n, width)  # flat: axis=1 is per-row slow
        stream[: n * r].reshape(n, r)[:] = rem_bits[:, width - r:]
    return np.packbits(stream).tobytes()


def _decode_body(body: bytes | memoryview, n: int, r: int, bits: int) -> npt.NDArray[np.uint64]:
    """Inverse of _encode_body; the body must be exactly the encoded bytes, no more, no less."""
    if n == 0:
        if len(body):
            raise CorruptError(f"{len(body)} trailing bytes after an empty position list")
        return _EMPTY.copy()
    rem_total = n * r
    if rem_total + n > 8 * len(body):
        raise TruncatedError(
            f"{n} positions with Rice parameter {r} need at least {(rem_total + n + 7) // 8} bytes, got {len(body)}")
    stream = np.unpackbits(np.frombuffer(body, dtype=np.uint8))
    ones = np.flatnonzero(stream[rem_total:].view(np.bool_))  # bool view: several times faster
    if ones.size < n:
        raise TruncatedError(f"unary stream holds {ones.size} of {n} codes: input is truncated")
    end_bit = rem_total + int(ones[n - 1]) + 1
    if (end_bit + 7) // 8 != len(body):
        raise CorruptError(
            f"{len(body) - (end_bit + 7) // 8} trailing bytes after {n} positions")
    if ones.size > n:
        raise CorruptError("padding bits after the last code are not zero")
    # With t_i the unary terminators, sum_{j<=i} q_j = t_i - i, so
    #   p_i = sum_{j<=i} (g_j + 1) - 1 = ((t_i - i) << r) + sum_{j<=i} rem_j + i
    # and no per-gap array is needed. Every term is non-negative and p_i grows by g_i + 1 >= 1
    # per step, so once the exact last position (Python ints) is < m no partial sum overflowed.
    index = np.arange(n, dtype=np.uint64)
    high = ones[:n].astype(np.uint64)
    high -= index
    if r:
        dtype = _word_dtype(r)
        width = 8 * np.dtype(dtype).itemsize
        rows = np.zeros((n, width), dtype=np.uint8)
        rows[:, width - r:] = stream[:rem_total].reshape(n, r)
        remainders = np.packbits(rows.reshape(-1)).view(dtype).astype(np.uint64)  # flat: axis=1 is per-row slow
        rem_sum = int((remainders >> _U64(32)).sum()) << 32 if r > 32 else 0
        rem_sum += int((remainders & _U64(0xFFFFFFFF)).sum())
    else:
        remainders = None
        rem_sum = 0
    last = ((int(high[-1])) << r) + rem_sum + n - 1
    if last >= bits:
        raise OutOfRangeError(f"position {last} is out of range for a filter of {bits} bits")
    positions = high << _U64(r) if r else high
    if remainders is not None:
        positions += np.cumsum(remainders, dtype=np.uint64)
    positions += index
    return positions


def _read_rice_parameter(data: bytes | memoryview, offset: int, bits: int) -> tuple[int, int]:
    if offset >= len(data):
        raise TruncatedError(f"input ends before the Rice parameter byte (offset {offset})")
    r = data[offset]
    limit = rice_parameter_limit(bits)
    if r > limit:
        raise CorruptError(f"Rice parameter {r} is larger than {limit}, the most a {bits}-bit filter can use")
    return r, offset + 1


def _check_count(n: int, bits: int, max_positions: int | None, what: str) -> None:
    if n > bits:
        raise OutOfRangeError(f"{what} count {n} exceeds the filter size of {bits} bits")
    if max_positions is not None and n > max_positions:
        raise OversizeError(f"{what} count {n} exceeds the allowed maximum of {max_positions}")


def _check_bits(bits: int) -> None:
    if isinstance(bits, bool) or not isinstance(bits, int) or bits < 1:
        raise ValueError(f"bits (m) must be a positive integer, got {bits!r}")


# --------------------------------------------------------------------------- positions block

def encode_positions(positions: npt.ArrayLike, bits: int) -> bytes:
    """Encode sorted unique positions < bits as: varint count, [u8 Rice parameter, body].

    The block runs to the end of its container (no length field); decode_positions insists
    on the exact length, so trailing garbage is an error.
    """
    arr = _check_positions(positions, bits)
    out = bytearray()
    write_varint(out, int(arr.size))
    if arr.size:
        gaps = gaps_of(arr)
        r = choose_rice_parameter(gaps, bits)
        out.append(r)
        out += _encode_body(gaps, r)
    return bytes(out)


def _check_size(size: int, max_bytes: int | None, what: str) -> None:
    if max_bytes is not None and size > max_bytes:
        raise OversizeError(f"{what} of {size} bytes exceeds the allowed maximum of {max_bytes} bytes")


def decode_positions(data: bytes | bytearray | memoryview, bits: int, *,
                     max_positions: int | None = None, max_bytes: int | None = None) -> npt.NDArray[np.uint64]:
    """Decode a block made by encode_positions; whole array or a CodecError."""
    _check_bits(bits)
    view = memoryview(data).cast("B") if not isinstance(data, bytes) else data
    _check_size(len(view), max_bytes, "positions block")
    n, offset = _read_varint(view, 0, "position count")
    _check_count(n, bits, max_positions, "position")
    if n == 0:
        if offset != len(view):
            raise CorruptError(f"{len(view) - offset} trailing bytes after an empty position list")
        return _EMPTY.copy()
    r, offset = _read_rice_parameter(view, offset, bits)
    return _decode_body(view[offset:], n, r, bits)


# --------------------------------------------------------------------------- delta

def encode_delta(changes: ChangeSet, bits: int) -> bytes:
    """Delta v1: u8 version, varint set count, varint cleared count, then per non-empty
    section u8 Rice parameter + varint body length, then the bodies, then CRC-32 (zlib
    polynomial, little-endian u32) of everything before it."""
    set_arr = _check_positions(changes.set_positions, bits)
    clr_arr = _check_positions(changes.cleared_positions, bits)
    if overlaps(set_arr, clr_arr):
        raise ValueError("a position cannot be both set and cleared in one delta")
    out = bytearray((DELTA_FORMAT_VERSION,))
    write_varint(out, int(set_arr.size))
    write_varint(out, int(clr_arr.size))
    bodies: list[bytes] = []
    for arr in (set_arr, clr_arr):
        if arr.size:
            gaps = gaps_of(arr)
            r = choose_rice_parameter(gaps, bits)
            body = _encode_body(gaps, r)
            out.append(r)
            write_varint(out, len(body))
            bodies.append(body)
    for body in bodies:
        out += body
    out += zlib.crc32(out).to_bytes(4, "little")
    return bytes(out)


def decode_delta(payload: bytes | bytearray | memoryview, bits: int, *,
                 max_positions: int | None = None, max_bytes: int | None = None) -> ChangeSet:
    """Decode a delta; max_positions bounds set + cleared together, max_bytes the payload.
    Whole ChangeSet or a CodecError.

    Check order: version, header (truncation / bounds), exact length, CRC, then the bodies,
    so a truncated payload is a TruncatedError and any altered byte at least a CorruptError.
    """
    _check_bits(bits)
    _check_size(memoryview(payload).nbytes, max_bytes, "delta payload")  # before copying anything
    data = bytes(payload)
    if not data:
        raise TruncatedError("empty delta payload")
    if data[0] != DELTA_FORMAT_VERSION:
        raise VersionError(f"delta format version {data[0]} is not supported (this build reads {DELTA_FORMAT_VERSION})")
    n_set, offset = _read_varint(data, 1, "set count")
    n_clr, offset = _read_varint(data, offset, "cleared count")
    _check_count(n_set, bits, None, "set position")
    _check_count(n_clr, bits, None, "cleared position")
    if n_set + n_clr > bits:
        raise OutOfRangeError(f"{n_set} set + {n_clr} cleared positions exceed the filter size of {bits} bits")
    if max_positions is not None and n_set + n_clr > max_positions:
        raise OversizeError(
            f"delta holds {n_set} set + {n_clr} cleared positions, more than the allowed {max_positions}")
    sections: list[tuple[int, int, int]] = []  # (count, r, body length)
    for n, what in ((n_set, "set"), (n_clr, "cleared")):
        if n:
            r, offset = _read_rice_parameter(data, offset, bits)
            length, offset = _read_varint(data, offset, f"{what} body length")
            if length < (n * r + n + 7) // 8:
                raise CorruptError(f"{what} body length {length} is too small for {n} positions")
            sections.append((n, r, length))
        else:
            sections.append((0, 0, 0))
    expected = offset + sum(s[2] for s in sections) + 4
    if len(data) < expected:
        raise TruncatedError(f"delta is {len(data)} bytes, its header announces {expected}")
    if len(data) > expected:
        raise CorruptError(f"{len(data) - expected} trailing bytes after the delta")
    stored_crc = int.from_bytes(data[-4:], "little")
    if zlib.crc32(memoryview(data)[:-4]) != stored_crc:
        raise CorruptError("delta CRC-32 mismatch: the payload was altered in transit")
    decoded = []
    for n, r, length in sections:
        body = memoryview(data)[offset: offset + length]
        decoded.append(_decode_body(body, n, r, bits))
        offset += length
    set_arr, clr_arr = decoded
    if overlaps(set_arr, clr_arr):
        raise CorruptError("a position is both set and cleared in one delta")
    return ChangeSet(set_arr, clr_arr)


def entropy_bound_bits(count: int, bits: int) -> float:
    """log2 C(m, d) computed with lgamma: the fewest bits any code can spend on a
    d-subset of m when all subsets are equally likely (counting argument; common practice)."""
    if count < 0 or count > bits:
        raise ValueError(f"count must be in [0, {bits}], got {count}")
    return (math.lgamma(bits + 1) - math.lgamma(count + 1) - math.lgamma(bits - count + 1)) / math.log(2)
