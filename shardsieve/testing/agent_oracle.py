"""The oracle of the agent tests: the store's actual keys, as a plain Bloom filter.

After an agent's feed settles, a BloomFilter of the same geometry built from the keys the
store really holds must be covered by the agent's counting filter (every bit of every key
set: zero false negatives), and equal to it where no race left an over-count.

For agents run as processes (tests/cluster/test_agent_daemon_*.py) the same question goes
through a real coordinator: `not_routed_to` lists the store's keys whose candidates lack the
agent; `scrape` reads the agent's metrics endpoint (its feed figures).
"""

from __future__ import annotations

from typing import Any, Iterable, Sequence

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


# --------------------------------------------------------------------------- through a coordinator


def not_routed_to(router: Any, keys: Sequence[bytes], node_id: str, batch: int = 2000) -> list[bytes]:
    """The keys whose candidates (LocateBatch of a real coordinator) lack `node_id`: each one is
    a false negative when the key exists in that node's store."""
    from shardsieve.v1 import routing_pb2

    missing: list[bytes] = []
    for start in range(0, len(keys), batch):
        part = list(keys[start:start + batch])
        reply = router.LocateBatch(routing_pb2.LocateBatchRequest(keys=part), timeout=30)
        missing += [k for k, r in zip(part, reply.results) if node_id not in {c.node_id for c in r.candidates}]
    return missing


def scrape(port: int) -> dict[str, float]:
    """A metrics endpoint on loopback as {sample name: value}, summed over label sets."""
    import urllib.request

    from prometheus_client.parser import text_string_to_metric_families

    text = urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5).read().decode()
    values: dict[str, float] = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            values[sample.name] = values.get(sample.name, 0.0) + float(sample.value)
    return values
