"""The oracle of the agent tests: the store's actual keys, as a plain Bloom filter.

After an agent's feed settles, a BloomFilter of the same geometry built from the keys the
store really holds must be covered by the agent's counting filter (every bit of every key
set: zero false negatives), and equal to it where no race left an over-count.
"""

from __future__ import annotations

from typing import Iterable

from shardsieve.bloom import BloomFilter
from shardsieve.node.core import NodeCore


def filter_report(core: NodeCore, store_keys: Iterable[bytes]) -> tuple[int, bool]:
    """(bits the store's keys need that the agent's filter lacks, whether the two are equal)."""
    keys = sorted(set(store_keys))
    with core.lock:
        assert core.sync is not None, "the agent has no filter yet"
        agent = core.sync.filter.bits.copy()
    oracle = BloomFilter(core.sync.geometry)
    if keys:
        oracle.add_batch(keys)
    return int((oracle.bits & ~agent).count()), oracle.bits == agent


def assert_filter_matches(core: NodeCore, store_keys: Iterable[bytes], exact: bool = True) -> None:
    missing, equal = filter_report(core, store_keys)
    assert missing == 0, f"{missing} bits of the store's keys are missing from the agent's filter (false negatives)"
    if exact:
        assert equal, "the agent's filter has bits no key of the store needs (an over-count where no race occurred)"
