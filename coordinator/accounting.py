"""False-positive accounting per node and for the fleet; pure counters, no I/O.

For every read the coordinator knows, per node, whether its filter was consulted, whether it
was probed, and whether the probe found the key. From that it derives:
- wasted probes: probes that found nothing (whatever the reason the node was listed),
- observed FPR: filter false positives over the lookups checked against that node's filter
  for keys it did not hold, with a Wilson score 95% interval (shardsieve/intervals.py).
Predicted FPR (fill^k) lives in shardsieve/sizing.py, avoided fan-out in shardsieve/fanout.py.

It subscribes to the sync events: a replica installed in a new epoch restarts that node's
observed FPR (the old counts describe the old filter), an unlisted node loses its counters.
Not thread-safe: the coordinator calls it under its one lock (docs/architecture.md#how-events-flow).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Iterable

from shardsieve.intervals import wilson_interval
from shardsieve.sync.coordinator_side import NodeUnlisted, ReplicaInstalled, SyncEvent


@dataclass
class NodeCounters:
    """Counters of one node since its filter epoch began (reset on a new epoch)."""

    probes: int = 0
    wasted_probes: int = 0
    hits: int = 0
    lookups_checked: int = 0     # lookups checked against its filter for keys it did not hold
    false_positives: int = 0     # of those, how many its filter listed anyway
    unreachable: int = 0
    epoch: int | None = None

    @property
    def observed_fpr(self) -> float:
        return self.false_positives / self.lookups_checked if self.lookups_checked else 0.0

    def interval(self) -> tuple[float, float]:
        return wilson_interval(self.false_positives, self.lookups_checked)


@dataclass(frozen=True)
class ProbeOutcome:
    """One node's part in one read.

    consulted: its filter was in the index and checked for this key.
    listed_by_filter: the filter said "maybe" (not just a stale or hinted listing).
    probed: a probe was sent; found: the probe found the key; reached: the probe got an answer.
    """

    node_id: str
    consulted: bool
    listed_by_filter: bool
    probed: bool
    found: bool = False
    reached: bool = True


@dataclass
class FleetTotals:
    lookups: int = 0
    probes: int = 0
    wasted_probes: int = 0
    lookups_checked: int = 0
    false_positives: int = 0


@dataclass
class Accounting:
    """Counters fed by the read path; read by metrics, admin and the monitor."""

    nodes: dict[str, NodeCounters] = field(default_factory=dict)
    totals: FleetTotals = field(default_factory=FleetTotals)

    def node(self, node_id: str) -> NodeCounters:
        """node_id's counters (created at zero for a node not seen yet)."""
        c = self.nodes.get(node_id)
        if c is None:
            c = self.nodes[node_id] = NodeCounters()
        return c

    def record_read(self, outcomes: Iterable[ProbeOutcome]) -> None:
        """Account one read from the per-node outcomes (every node the index knows, plus probed ones)."""
        self.totals.lookups += 1
        for o in outcomes:
            c = self.node(o.node_id)
            if o.probed:
                c.probes += 1
                self.totals.probes += 1
                if not o.reached:
                    c.unreachable += 1
                elif o.found:
                    c.hits += 1
                else:
                    c.wasted_probes += 1
                    self.totals.wasted_probes += 1
            # The key was not on this node when its probe missed, or when its filter did not
            # list it (filters have no false negatives). Unprobed "maybe"s prove nothing.
            if o.consulted and not o.found and o.reached and (o.probed or not o.listed_by_filter):
                c.lookups_checked += 1
                self.totals.lookups_checked += 1
                if o.listed_by_filter:
                    c.false_positives += 1
                    self.totals.false_positives += 1

    def new_epoch(self, node_id: str, epoch: int) -> None:
        """A node's filter was replaced: its observed FPR starts over (old counts describe the old filter)."""
        c = self.node(node_id)
        if c.epoch is not None and c.epoch != epoch:
            c.lookups_checked = 0
            c.false_positives = 0
        c.epoch = epoch

    def drop_node(self, node_id: str) -> None:
        self.nodes.pop(node_id, None)

    def snapshot(self) -> tuple[dict[str, NodeCounters], FleetTotals]:
        """Copies of the counters (consistent with each other)."""
        return ({k: NodeCounters(**vars(v)) for k, v in self.nodes.items()}, FleetTotals(**vars(self.totals)))

    def on_event(self, event: SyncEvent) -> None:
        if isinstance(event, ReplicaInstalled):
            self.new_epoch(event.node_id, event.epoch)
        elif isinstance(event, NodeUnlisted):
            self.drop_node(event.node_id)
