"""Hypothesis state machine: the fresh set kept between lookups (coordinator/membership.py
`FreshNodes`) against the freshness rule computed afresh (`fresh_nodes`, the rule of
docs/coordinator.md, "Freshness contract": fresh = synced and heard from within stale-after-s).

A real CoordinatorSync is driven by simulated nodes (shardsieve/testing/replica_feed.py): streams
open and close, heartbeats and deltas arrive, a lost delta leaves a node waiting for a snapshot,
a snapshot brings it back, an operator unlists a node, stale-after-s changes; the clock mostly
moves forward, sometimes a little and sometimes past stale-after-s, and now and then goes back.
After every step a lookup at a random time must get exactly the rule's answer: a node wrongly
kept fresh would drop out of safe mode's stale listing (docs/architecture.md#3-bounded-staleness).
"""

from __future__ import annotations

from hypothesis import HealthCheck, settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, invariant, rule

from shardsieve.bloom import BloomFilter
from shardsieve.coordinator.membership import FreshNodes, fresh_nodes
from shardsieve.coordinator.policy import Policy
from shardsieve.geometry import Geometry
from shardsieve.sync.coordinator_side import CoordinatorSync, DictReplicaSink
from shardsieve.testing.replica_feed import NodeFeed

GEOMETRY = Geometry(bits=1024, hashes=3)
NODES = [f"node-tide-{i}" for i in range(5)]


class FreshNodesMachine(RuleBasedStateMachine):
    def __init__(self) -> None:
        super().__init__()
        self.sync = CoordinatorSync(DictReplicaSink())
        self.feeds = {n: NodeFeed(self.sync, n, BloomFilter(GEOMETRY)) for n in NODES}
        self.kept = FreshNodes()
        self.now = 100.0
        self.policy = Policy(stale_after_s=2.0)
        self.keys = 0

    def _feed(self, i: int) -> NodeFeed:
        return self.feeds[NODES[i]]

    @rule(i=st.integers(0, len(NODES) - 1))
    def connect(self, i: int) -> None:
        self._feed(i).connect(self.now)

    @rule(i=st.integers(0, len(NODES) - 1))
    def heartbeat(self, i: int) -> None:
        feed = self._feed(i)
        if feed.stream_id is not None:
            feed.heartbeat(self.now)

    @rule(i=st.integers(0, len(NODES) - 1))
    def delta(self, i: int) -> None:
        feed = self._feed(i)
        if feed.stream_id is not None:
            self.keys += 1
            feed.add([f"crate-{self.keys}".encode()], self.now)

    @rule(i=st.integers(0, len(NODES) - 1))
    def lose_a_delta(self, i: int) -> None:      # a gap: the node waits for a snapshot (not synced)
        feed = self._feed(i)
        if feed.stream_id is not None:
            feed.skip(self.now)

    @rule(i=st.integers(0, len(NODES) - 1))
    def snapshot(self, i: int) -> None:
        feed = self._feed(i)
        if feed.stream_id is not None:
            feed.snapshot(self.now)

    @rule(i=st.integers(0, len(NODES) - 1))
    def close(self, i: int) -> None:
        self._feed(i).close(self.now)

    @rule(i=st.integers(0, len(NODES) - 1))
    def unlist(self, i: int) -> None:
        node_id = NODES[i]
        self.sync.unlist(node_id)
        self.feeds[node_id] = NodeFeed(self.sync, node_id, BloomFilter(GEOMETRY))

    @rule(step=st.sampled_from([0.0, 0.1, 0.5, 1.0, 1.99, 2.0, 2.01, 3.0, 7.5, -0.3, -2.5]))
    def clock(self, step: float) -> None:
        self.now += step

    @rule(after=st.sampled_from([0.5, 2.0, 4.0]))
    def stale_after(self, after: float) -> None:
        self.policy = Policy(stale_after_s=after)

    @invariant()
    def a_lookup_gets_the_rule(self) -> None:
        for at in (self.now, self.now + 0.25, self.now + 1.9):
            heard = self.sync.synced_heard()
            expected = fresh_nodes(heard, self.policy, at)
            assert self.kept.get(heard, self.sync.synced_changes(), self.policy, at) == expected


TestFreshNodes = FreshNodesMachine.TestCase
TestFreshNodes.settings = settings(max_examples=150, stateful_step_count=40, deadline=None,
                                   suppress_health_check=[HealthCheck.too_slow])
