"""What the load tester reads: seeded key names, placement, popularity and the lookup stream.

Pure: every function takes a numpy Generator so a run is reproducible from its seed.
Absent keys are fresh names never written, so each miss is an independent trial against every
node's filter (a repeated absent key would give the same answer each time).
"""

from __future__ import annotations

import secrets
from dataclasses import dataclass
from typing import Iterator, Sequence

import numpy as np


def new_run_id() -> str:
    """Short random tag so key names of different runs never collide."""
    return secrets.token_hex(4)


def seed_key(run_id: str, index: int) -> bytes:
    return f"lt/{run_id}/k{index:09d}".encode()


def absent_key(run_id: str, index: int) -> bytes:
    """A name in a namespace nothing ever writes to."""
    return f"lt/{run_id}/absent/{index:012d}".encode()


def place_keys(rng: np.random.Generator, count: int, node_ids: Sequence[str]) -> list[str]:
    """Uniformly random owner per key (placement the coordinator cannot derive from the key)."""
    if not node_ids:
        raise ValueError("the fleet has no nodes to place keys on")
    picks = rng.integers(0, len(node_ids), size=count)
    return [node_ids[int(i)] for i in picks]


class Popularity:
    """Which existing key a hit reads: uniform, or Zipf with exponent s over a finite set.

    Zipf: P(rank r) proportional to 1 / r^s for r = 1..n (Zipf 1949; finite-support form, so any
    s > 0 works). Ranks are assigned to keys by a random permutation so popularity is not tied to
    seeding order or placement.
    """

    def __init__(self, size: int, s: float = 0.0, rng: np.random.Generator | None = None) -> None:
        if size < 1:
            raise ValueError("popularity needs at least one key")
        if s < 0 or not np.isfinite(s):
            raise ValueError(f"Zipf exponent must be >= 0 (0 means uniform), got {s}")
        self.size = size
        self.s = float(s)
        rng = rng or np.random.default_rng()
        if self.s == 0.0:
            self._cdf = None
            self._perm = None
        else:
            weights = np.arange(1, size + 1, dtype=np.float64) ** (-self.s)
            self._cdf = np.cumsum(weights / weights.sum())
            self._cdf[-1] = 1.0
            self._perm = rng.permutation(size)

    def probabilities(self) -> np.ndarray:
        """P(item i) for every item index (for tests and diagnostics)."""
        if self._cdf is None:
            return np.full(self.size, 1.0 / self.size)
        by_rank = np.diff(np.concatenate(([0.0], self._cdf)))
        probs = np.empty(self.size)
        probs[self._perm] = by_rank
        return probs

    def sample(self, rng: np.random.Generator, count: int) -> np.ndarray:
        if self._cdf is None:
            return rng.integers(0, self.size, size=count)
        ranks = np.searchsorted(self._cdf, rng.random(count), side="right")
        ranks = np.minimum(ranks, self.size - 1)
        return self._perm[ranks]


@dataclass(frozen=True)
class Lookup:
    key: bytes
    owner: str | None   # node holding the key, None for a key that exists nowhere


class LookupStream:
    """Endless (or counted) stream of lookups: a `hit_share` of existing keys, the rest absent."""

    def __init__(self, rng: np.random.Generator, keys: Sequence[bytes], owners: Sequence[str],
                 run_id: str, hit_share: float = 0.5, zipf_s: float = 0.0, batch: int = 4096) -> None:
        if not 0.0 <= hit_share <= 1.0:
            raise ValueError(f"share of existing keys must be within 0..1, got {hit_share}")
        if hit_share > 0 and not keys:
            raise ValueError("a share of existing keys was asked for but no keys are seeded")
        if len(keys) != len(owners):
            raise ValueError("every key needs exactly one owner")
        self.rng = rng
        self.keys = list(keys)
        self.owners = list(owners)
        self.run_id = run_id
        self.hit_share = hit_share
        self.popularity = Popularity(len(keys), zipf_s, rng) if keys else None
        self.batch = batch
        self._absent_next = 0

    def take(self, count: int) -> list[Lookup]:
        is_hit = self.rng.random(count) < self.hit_share
        hits = int(is_hit.sum())
        picks = self.popularity.sample(self.rng, hits) if hits and self.popularity else np.empty(0, int)
        out: list[Lookup] = []
        h = 0
        for flag in is_hit:
            if flag:
                i = int(picks[h])
                h += 1
                out.append(Lookup(self.keys[i], self.owners[i]))
            else:
                out.append(Lookup(absent_key(self.run_id, self._absent_next), None))
                self._absent_next += 1
        return out

    def __iter__(self) -> Iterator[Lookup]:
        while True:
            yield from self.take(self.batch)
