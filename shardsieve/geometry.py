"""Filter geometry (m bits, k hashes, hash scheme id, seed) and the size ladder.

A geometry is part of the wire contract: two filters can be compared, merged or
replicated only when their geometries are equal. Sizes snap to a ladder of powers of two
(docs/architecture.md#geometries-come-from-a-ladder) so a fleet shares a handful of
geometries and range reduction becomes a shift.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

from shardsieve.sizing import optimal_bits, optimal_hashes

if TYPE_CHECKING:  # pragma: no cover
    from shardsieve.v1 import filter_pb2

SCHEME_MMH3_KM_V1 = 1  # equals filter_pb2.HASH_SCHEME_MMH3_KM_V1; see docs/hash-scheme.md
KNOWN_SCHEMES = frozenset({SCHEME_MMH3_KM_V1})
MIN_BITS = 1 << 10
MAX_BITS = 1 << 40
MAX_HASHES = 32
MAX_SEED = 0xFFFFFFFF


class GeometryError(ValueError):
    """A geometry outside the supported bounds; the message names the field and the bound."""


@dataclass(frozen=True, slots=True)
class Geometry:
    """The shape of a filter: m bits, k hashes, the hash scheme id and the mmh3 seed."""

    bits: int
    hashes: int
    scheme: int = SCHEME_MMH3_KM_V1
    seed: int = 0

    def validate(self) -> None:
        """Raise GeometryError naming the first field outside its bound."""
        for name in ("bits", "hashes", "scheme", "seed"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int):
                raise GeometryError(f"geometry {name} must be an integer, got {value!r}")
        if not MIN_BITS <= self.bits <= MAX_BITS:
            raise GeometryError(f"geometry bits must be between {MIN_BITS} and {MAX_BITS} (2^40), got {self.bits}")
        if not 1 <= self.hashes <= MAX_HASHES:
            raise GeometryError(f"geometry hashes must be between 1 and {MAX_HASHES}, got {self.hashes}")
        if self.scheme not in KNOWN_SCHEMES:
            raise GeometryError(
                f"geometry scheme {self.scheme} is unknown; supported: {sorted(KNOWN_SCHEMES)} (MMH3_KM_V1 = 1)")
        if not 0 <= self.seed <= MAX_SEED:
            raise GeometryError(f"geometry seed must be between 0 and {MAX_SEED} (32-bit), got {self.seed}")

    @property
    def byte_size(self) -> int:
        """Bytes of the raw bit vector."""
        return (self.bits + 7) // 8

    @property
    def is_power_of_two(self) -> bool:
        return self.bits > 0 and self.bits & (self.bits - 1) == 0

    def to_proto(self) -> filter_pb2.Geometry:
        from shardsieve.v1 import filter_pb2

        return filter_pb2.Geometry(bits=self.bits, hashes=self.hashes, scheme=self.scheme, seed=self.seed)

    @classmethod
    def from_proto(cls, msg: filter_pb2.Geometry) -> Geometry:
        """Build from the wire message; validates, so a bad peer gets a GeometryError."""
        geometry = cls(bits=int(msg.bits), hashes=int(msg.hashes), scheme=int(msg.scheme), seed=int(msg.seed))
        geometry.validate()
        return geometry

    def __str__(self) -> str:
        return f"m={self.bits} k={self.hashes} scheme={self.scheme} seed={self.seed}"


def ladder_step(min_bits: int) -> int:
    """The smallest ladder size (a power of two, at least MIN_BITS) holding min_bits."""
    if min_bits > MAX_BITS:
        raise GeometryError(f"a filter of {min_bits} bits exceeds the largest ladder step {MAX_BITS} (2^40)")
    need = max(int(min_bits), MIN_BITS)
    return 1 << (need - 1).bit_length()


def geometry_for(capacity: int, target_fpr: float, seed: int = 0) -> Geometry:
    """Geometry for capacity keys at target_fpr: m from the sizing formula rounded up to
    the ladder, k from the formula's m (so every node of a fleet with one target shares k)."""
    formula_bits = optimal_bits(capacity, target_fpr)
    hashes = min(optimal_hashes(formula_bits, capacity), MAX_HASHES)
    geometry = Geometry(bits=ladder_step(formula_bits), hashes=hashes, scheme=SCHEME_MMH3_KM_V1, seed=seed)
    geometry.validate()
    return geometry
