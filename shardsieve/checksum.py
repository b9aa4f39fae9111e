"""Order-independent incremental checksum of a filter's set bit positions.

checksum = XOR over every set position p of mix64(p), where mix64 is the SplitMix64
finalizer (Steele, Lea & Flood, "Fast splittable pseudorandom number generators",
OOPSLA 2014). Flipping bit p in either direction XORs mix64(p) into the checksum, so a
change set updates it in O(changed bits) and two copies with equal bits agree whatever
order the changes arrived in. The empty filter has checksum 0.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MASK = (1 << 64) - 1


def mix64(position: int) -> int:
    """SplitMix64 finalizer of (position + golden ratio), as a Python int."""
    z = (position + 0x9E3779B97F4A7C15) & _MASK
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _MASK
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _MASK
    return z ^ (z >> 31)


def mix64_array(positions: npt.NDArray[np.uint64]) -> npt.NDArray[np.uint64]:
    """Vectorised mix64 over an array of positions."""
    with np.errstate(over="ignore"):
        z = positions.astype(np.uint64, copy=True)
        z += _GOLDEN
        z ^= z >> np.uint64(30)
        z *= _M1
        z ^= z >> np.uint64(27)
        z *= _M2
        z ^= z >> np.uint64(31)
    return z


def xor_of(positions: npt.NDArray[np.uint64] | list[int]) -> int:
    """XOR of mix64 over positions: the checksum contribution of toggling all of them."""
    arr = np.asarray(positions, dtype=np.uint64)
    if arr.size == 0:
        return 0
    return int(np.bitwise_xor.reduce(mix64_array(arr)))


def updated(checksum: int, set_positions: npt.NDArray[np.uint64], cleared_positions: npt.NDArray[np.uint64]) -> int:
    """Checksum after flipping the given positions (0->1 and 1->0 alike toggle)."""
    return checksum ^ xor_of(set_positions) ^ xor_of(cleared_positions)
