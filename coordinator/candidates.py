"""Candidates of keys: the one merge behind Locate, LocateBatch, Read, Write and Remove.

The freshness contract (docs/coordinator.md, "Freshness contract"), per key, in this order:
  (a) every node whose replica filter has all k bits of the key set
      (docs/architecture.md#1-no-false-negatives-once-synced);
  (b) every node holding a read-your-writes hint for the key, not listed already
      (docs/architecture.md#2-read-your-writes-through-a-coordinator);
  (c) in safe mode, every stale node not listed already, marked stale; fast mode leaves them
      out (docs/architecture.md#3-bounded-staleness).

The result is compact (`CandidateLists`): the index's matches stay in their CSR form, and
(b) and (c) are added only where they apply, so the common batch (no hints, no stale node)
costs no Python object per key. coordinator/wire.py encodes it for the gRPC replies;
`rows()` gives Candidate objects for the read and write paths.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np
import numpy.typing as npt

from shardsieve.coordinator.hints import HintTable
from shardsieve.coordinator.membership import FreshNodes, Membership
from shardsieve.coordinator.policy import LivePolicy
from shardsieve.coordinator.replicas import Replicas
from shardsieve.coordinator.shell import CoordinatorShell

@dataclass(frozen=True, slots=True)
class Candidate:
    node_id: str
    address: str
    stale: bool
    hinted: bool
    listed_by_filter: bool


@dataclass(frozen=True, slots=True)
class CandidateLists:
    """Candidates of a batch of keys. For key i, in order:

    1. matched[offsets[i]:offsets[i+1]]: nodes whose filter lists the key;
    2. hinted[i]: nodes listed by a read-your-writes hint, not by their filter (None: no hints held);
    3. tails.get(i, stale_tail): safe mode, the stale nodes not listed by 1 or 2.

    A node's address is addresses[node]; it is stale unless it is in `fresh`. `total` counts
    every candidate of every key.
    """

    offsets: npt.NDArray[np.int64]
    matched: list[str]
    hinted: list[tuple[str, ...]] | None
    stale_tail: tuple[str, ...]
    tails: dict[int, tuple[str, ...]]
    addresses: Mapping[str, str]
    fresh: set[str]
    total: int

    def __len__(self) -> int:
        return len(self.offsets) - 1

    @property
    def plain(self) -> bool:
        """Only filter matches: no hint and no stale node is listed for any key."""
        return self.hinted is None and not self.stale_tail

    def row(self, i: int) -> list[Candidate]:
        address, fresh = self.addresses, self.fresh
        a, b = int(self.offsets[i]), int(self.offsets[i + 1])
        out = [Candidate(n, address.get(n, ""), n not in fresh, False, True) for n in self.matched[a:b]]
        if self.hinted is not None:
            out += [Candidate(n, address.get(n, ""), n not in fresh, True, False) for n in self.hinted[i]]
        out += [Candidate(n, address.get(n, ""), True, False, False) for n in self.tails.get(i, self.stale_tail)]
        return out

    def rows(self) -> list[list[Candidate]]:
        return [self.row(i) for i in range(len(self))]


def stale_nodes(addresses: Mapping[str, str], fresh: set[str]) -> tuple[str, ...]:
    """Every known node that is not fresh, by node id: what safe mode lists for every key."""
    return tuple(sorted(n for n in addresses if n not in fresh))


def merge(offsets: npt.NDArray[np.int64], matched: list[str], hinted: Sequence[Sequence[str]] | None,
          addresses: Mapping[str, str], fresh: set[str], safe_mode: bool,
          stale: tuple[str, ...] | None = None) -> CandidateLists:
    """The freshness contract's merge: filter matches, then hints, then (safe mode) every known
    node that is not fresh; each node once per key. `stale`: stale_nodes(addresses, fresh) when
    the caller has it already."""
    if not safe_mode:
        stale_tail: tuple[str, ...] = ()
    else:
        stale_tail = stale if stale is not None else stale_nodes(addresses, fresh)
    if hinted is None and not stale_tail:
        return CandidateLists(offsets, matched, None, (), {}, addresses, fresh, len(matched))
    bounds = offsets.tolist()
    added: list[tuple[str, ...]] | None = [] if hinted is not None else None
    tails: dict[int, tuple[str, ...]] = {}
    stale_set = set(stale_tail)
    total = len(matched)
    for i in range(len(bounds) - 1):
        listed = matched[bounds[i]:bounds[i + 1]]
        extra: tuple[str, ...] = ()
        if added is not None:
            hint_row = hinted[i]   # type: ignore[index]
            if hint_row:
                extra = tuple(n for n in hint_row if n not in listed)
            added.append(extra)
            total += len(extra)
        if stale_tail:
            present = stale_set.intersection(listed)
            if extra:
                present.update(stale_set.intersection(extra))
            if present:
                tail = tails[i] = tuple(n for n in stale_tail if n not in present)
                total += len(tail)
            else:
                total += len(stale_tail)
    return CandidateLists(offsets, matched, added, stale_tail, tails, addresses, fresh, total)


class CandidateFinder:
    """Looks keys up in the replicas and merges hints and stale nodes, under the freshness contract."""

    def __init__(self, replicas: Replicas, shell: CoordinatorShell, membership: Membership, hints: HintTable,
                 policy: LivePolicy) -> None:
        self._replicas = replicas
        self._shell = shell
        self._membership = membership
        self._hints = hints
        self._policy = policy
        # The fresh set and the stale nodes derived from it, kept between lookups (each is a
        # pass over the fleet): FreshNodes says when the fresh set still holds, and the stale
        # nodes are those of the same fresh set and membership mapping (both are replaced, not
        # changed, when they change).
        self._fresh = FreshNodes()
        self._stale: tuple[Mapping[str, str], set[str], tuple[str, ...]] | None = None

    def _stale_nodes(self, addresses: Mapping[str, str], fresh: set[str]) -> tuple[str, ...]:
        kept = self._stale
        if kept is None or kept[0] is not addresses or kept[1] is not fresh:
            kept = self._stale = (addresses, fresh, stale_nodes(addresses, fresh))
        return kept[2]

    def find(self, keys: Sequence[bytes], now: float, mode: str | None = None) -> CandidateLists:
        """Candidates of each key at time `now` (mode None: the policy's mode)."""
        with self._shell.lock:
            policy = self._policy.current
            hinted = self._hints.lookup_many(keys)
            addresses = self._membership.addresses()
            fresh = self._fresh.get(self._shell.synced_heard(), self._shell.synced_changes(), policy, now)
            stale = self._stale_nodes(addresses, fresh)
        # Hints first, filters second: a hint goes only once the replica holds its write, so a
        # hint missing here means the index below already lists the key. In the other order a
        # delta applied between the two reads could hide the key from both.
        found = self._replicas.locate(keys)   # the heavy part, outside the coordinator's lock
        return merge(found.offsets, found.nodes, hinted, addresses, fresh, (mode or policy.mode) == "safe", stale)
