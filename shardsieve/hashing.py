"""Key -> bit positions, hash scheme MMH3_KM_V1 (scheme id 1; written down in docs/hash-scheme.md).

For a key (bytes; str is encoded as UTF-8) and a geometry (m bits, k hashes, seed):
  1. D = MurmurHash3_x64_128(key, seed), the 16-byte digest as mmh3 returns it;
     h1 = D[0:8], h2 = D[8:16], both read as unsigned little-endian 64-bit integers.
  2. Kirsch-Mitzenmacher double hashing (Kirsch & Mitzenmacher, "Less hashing, same
     performance", 2006): g_i = (h1 + i * h2) mod 2^64 for i = 0 .. k-1.
  3. Multiply-shift range reduction: pos_i = floor(g_i * m / 2^64), the high 64 bits of the
     128-bit product. Every m in [1, 2^64) maps onto [0, m) with bias below m / 2^64
     (<= 2^-24 for m <= 2^40); for m = 2^b it is exactly g_i >> (64 - b).

Positions depend only on (key, geometry), so a batch is hashed once and the positions are
reused for every filter of that geometry. The batch path makes one bytes object per key
(the digest) and then works on whole numpy arrays: no Python object per key per hash and
no 64-bit modulo.
"""

from __future__ import annotations

from collections.abc import Sequence
from itertools import repeat

import mmh3
import numpy as np
import numpy.typing as npt

from shardsieve.geometry import Geometry

CHUNK_KEYS = 32768  # keys per batch step: the (chunk, k) uint64 arrays stay cache-sized

_digest = mmh3.mmh3_x64_128_digest
_LOW32 = np.uint64(0xFFFFFFFF)
_S32 = np.uint64(32)


def as_key_bytes(key: bytes | str) -> bytes:
    """Keys are bytes; str is encoded as UTF-8; bytearray/memoryview are copied to bytes."""
    if isinstance(key, bytes):
        return key
    if isinstance(key, str):
        return key.encode("utf-8")
    if isinstance(key, (bytearray, memoryview)):
        return bytes(key)
    raise TypeError(f"a key must be bytes or str, got {type(key).__name__}")


def digests(keys: Sequence[bytes | str], seed: int = 0) -> npt.NDArray[np.uint64]:
    """(n, 2) uint64 array of (h1, h2) for every key: step 1 of the scheme."""
    try:
        if seed == 0:
            joined = b"".join(map(_digest, keys))
        else:
            joined = b"".join(map(_digest, keys, repeat(seed)))
    except TypeError:
        # str keys (or other key types) in the batch: normalise them, then hash.
        normalised = [as_key_bytes(k) for k in keys]
        joined = b"".join(map(_digest, normalised, repeat(seed)))
    return np.frombuffer(joined, dtype="<u8").reshape(-1, 2).astype(np.uint64, copy=False)


def _mulhi(g: npt.NDArray[np.uint64], m: int) -> npt.NDArray[np.uint64]:
    """floor(g * m / 2^64) exactly, for uint64 arrays g and m < 2^64, in 32-bit limbs."""
    b0 = np.uint64(m & 0xFFFFFFFF)
    b1 = np.uint64(m >> 32)
    a0 = g & _LOW32
    a1 = g >> _S32
    with np.errstate(over="ignore"):
        t = a1 * b0                  # < 2^64
        t += (a0 * b0) >> _S32       # a1*b0 + carry < 2^64 (32x32 limbs)
        w1 = t & _LOW32
        w1 += a0 * b1                # < 2^32 + 2^64 - 2^33 + 1: no overflow
        hi = a1 * b1
        hi += t >> _S32
        hi += w1 >> _S32
    return hi


def reduce_range(g: npt.NDArray[np.uint64], bits: int, out: npt.NDArray[np.uint64] | None = None) -> npt.NDArray[np.uint64]:
    """Step 3: map 64-bit values onto [0, bits) by multiply-shift (in place when out is g)."""
    if bits & (bits - 1) == 0:
        shift = np.uint64(64 - (bits.bit_length() - 1))
        if shift == 64:  # m == 1
            result = np.zeros_like(g) if out is None else out
            result[...] = 0
            return result
        return np.right_shift(g, shift, out=out)
    result = _mulhi(g, bits)
    if out is not None:
        out[...] = result
        return out
    return result


def positions_kn(d: npt.NDArray[np.uint64], geometry: Geometry) -> npt.NDArray[np.uint64]:
    """Steps 2 and 3 over an (n, 2) digest array, laid out (k, n): row i holds pos_i of every key.

    Row-major per hash index keeps each row contiguous, so a query can AND k contiguous
    rows and an insert can scatter one flat array.
    """
    k, n = geometry.hashes, d.shape[0]
    g = np.empty((k, n), dtype=np.uint64)
    g[0] = d[:, 0]                      # g_0 = h1
    if k > 1:
        h2 = np.ascontiguousarray(d[:, 1])
        for i in range(1, k):           # g_i = g_(i-1) + h2 (mod 2^64): one add per row
            np.add(g[i - 1], h2, out=g[i])
    return reduce_range(g, geometry.bits, out=g)


def positions_from_digests(d: npt.NDArray[np.uint64], geometry: Geometry) -> npt.NDArray[np.uint64]:
    """Steps 2 and 3 over an (n, 2) digest array: (n, k) uint64 positions (a transposed view)."""
    return positions_kn(d, geometry).T


def positions(keys: Sequence[bytes | str], geometry: Geometry) -> npt.NDArray[np.uint64]:
    """Bit positions of every key: shape (len(keys), k), dtype uint64, row i belongs to keys[i].

    The array is the transpose of a C-ordered (k, n) array (Fortran order), which is what
    BloomFilter.contains_positions consumes without copying.
    """
    n = len(keys)
    out = np.empty((geometry.hashes, n), dtype=np.uint64)
    for start in range(0, n, CHUNK_KEYS):
        chunk = keys[start:start + CHUNK_KEYS]
        out[:, start:start + len(chunk)] = positions_kn(digests(chunk, geometry.seed), geometry)
    return out.T


def key_positions(key: bytes | str, geometry: Geometry) -> npt.NDArray[np.uint64]:
    """Bit positions of one key: shape (k,), dtype uint64."""
    d = np.frombuffer(_digest(as_key_bytes(key), geometry.seed), dtype="<u8").astype(np.uint64).reshape(1, 2)
    return positions_from_digests(d, geometry)[0]

