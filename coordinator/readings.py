"""The figures of every known node and of the fleet, read at one moment for status, metrics and the monitor.

Each reading is computed under the coordinator's lock from the live state (CoordinatorSync's
read-only NodeState, the replicas' set-bit counts, the accounting counters, the freshness rule
of coordinator/membership.py) and is never stored or updated: the next read computes it
again. What every node's reading needs (the fresh set, the set-bit counts, the counters) is
read once per pass, not once per node: the monitor's pass and a metrics scrape read the whole
fleet under the lock, so their cost per node is what the event loop waits for. Formulas come from their homes: fill^k (shardsieve/sizing.py), the fill plausibility
bound (shardsieve/limits.py).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

from shardsieve.coordinator.accounting import Accounting, FleetTotals, NodeCounters
from shardsieve.coordinator.hints import HintTable
from shardsieve.coordinator.membership import Membership, fresh_nodes, state_name
from shardsieve.coordinator.policy import LivePolicy, Policy
from shardsieve.coordinator.replicas import Replicas
from shardsieve.coordinator.saturation import FilterReading, SaturationMonitor
from shardsieve.coordinator.shell import CoordinatorShell
from shardsieve.geometry import Geometry
from shardsieve.limits import fill_implausibility
from shardsieve.sizing import fill_fpr
from shardsieve.v1 import sync_pb2


@dataclass(frozen=True)
class NodeReading:
    """One node's figures at one moment."""

    node_id: str
    address: str
    connected: bool
    has_replica: bool
    stale: bool
    state: str                        # disconnected, syncing, rebuilding, stale, fresh
    geometry: Geometry | None
    epoch: int
    sequence: int
    checksum: int
    key_count: int
    capacity: int
    set_bits: int
    lag_s: float | None               # since the node was last heard from (None: never)
    delta_bytes: int
    snapshots: int
    stats: sync_pb2.NodeStats | None  # the latest heartbeat's
    counters: NodeCounters | None     # accounting (None: no read involved it yet)
    snapshot_bytes: int = 0           # encoded snapshot bytes installed
    rebuild_age_s: float | None = None  # since the rebuild in flight was asked for (None: none)

    @property
    def fill(self) -> float:
        return self.set_bits / self.geometry.bits if self.geometry else 0.0

    @property
    def predicted_fpr(self) -> float:
        return fill_fpr(self.fill, self.geometry.hashes) if self.geometry else 0.0

    @property
    def implausibility(self) -> str:
        """Why the replica's fill cannot come from the node's declared key count ('' when it can)."""
        if self.geometry is None or not self.has_replica:
            return ""
        return fill_implausibility(self.set_bits, self.geometry.bits, self.geometry.hashes, self.key_count)

    def filter_reading(self) -> FilterReading | None:
        """The saturation monitor's input; None for a node without a verified replica."""
        if not self.has_replica or self.geometry is None:
            return None
        c = self.counters
        return FilterReading(self.node_id, self.epoch, self.key_count, max(1, self.capacity), self.fill,
                             self.geometry.hashes, self.geometry.bits, c.lookups_checked if c else 0,
                             c.false_positives if c else 0, fresh=not self.stale)


@dataclass(frozen=True)
class FleetReading:
    """The whole fleet at one moment."""

    policy: Policy
    nodes: list[NodeReading]          # by node id
    totals: FleetTotals
    rebuilds_in_progress: int
    hints_held: int
    hints_expired: int                # dropped by age while the replica still lacked their write
    index_bytes: int


class Readings:
    """Reads node and fleet figures under the coordinator's lock."""

    def __init__(self, shell: CoordinatorShell, membership: Membership, replicas: Replicas, accounting: Accounting,
                 monitor: SaturationMonitor, hints: HintTable, policy: LivePolicy) -> None:
        self._shell = shell
        self._membership = membership
        self._replicas = replicas
        self._accounting = accounting
        self._monitor = monitor
        self._hints = hints
        self._policy = policy

    def node_ids(self) -> list[str]:
        with self._shell.lock:
            return self._membership.node_ids()

    def nodes(self, now: float) -> list[NodeReading]:
        """Every known node, by node id."""
        with self._shell.lock:
            inputs = self._inputs(now)
            return [self._read(n, now, inputs) for n in self._membership.node_ids()]

    def node(self, node_id: str, now: float) -> NodeReading | None:
        with self._shell.lock:
            if not self._membership.knows(node_id):
                return None
            return self._read(node_id, now, self._inputs(now))

    def filters(self, now: float, node_ids: Sequence[str] | None = None) -> list[FilterReading]:
        """The saturation monitor's inputs: every node with a verified replica (of `node_ids`, by
        default every known node), by node id; read straight from the state, since the monitor's
        pass reads the whole fleet every interval."""
        with self._shell.lock:
            policy = self._policy.current
            fresh = fresh_nodes(self._shell.synced_heard(), policy, now)
            ones = self._replicas.set_bits_of_all()
            counters = self._accounting.nodes
            out = []
            for node_id in self._membership.node_ids() if node_ids is None else node_ids:
                state = self._shell.node(node_id)
                geometry = state.geometry if state is not None else None
                if state is None or not state.has_replica or geometry is None:
                    continue
                c = counters.get(node_id)
                out.append(FilterReading(node_id, state.epoch, state.key_count, max(1, state.capacity),
                                         ones.get(node_id, 0) / geometry.bits, geometry.hashes, geometry.bits,
                                         c.lookups_checked if c else 0, c.false_positives if c else 0,
                                         fresh=node_id in fresh))
            return out

    def replica_bytes(self) -> int:
        """Memory of the routing index now (what the rebuild memory cap is checked against)."""
        return self._replicas.memory_bytes()

    def fleet(self, now: float) -> FleetReading:
        with self._shell.lock:
            _, totals = self._accounting.snapshot()
            return FleetReading(self._policy.current, self.nodes(now), totals, len(self._monitor.in_flight),
                                len(self._hints), self._hints.expired_unapplied, self._replicas.memory_bytes())

    def _inputs(self, now: float) -> _PassInputs:
        policy = self._policy.current
        counters, _ = self._accounting.snapshot()
        return _PassInputs(policy, fresh_nodes(self._shell.synced_heard(), policy, now),
                           self._replicas.set_bits_of_all(), counters)

    def _read(self, node_id: str, now: float, inputs: _PassInputs) -> NodeReading:
        state = self._shell.node(node_id)
        in_flight = node_id in self._monitor.in_flight
        address = self._membership.address(node_id) or ""
        counters = inputs.counters.get(node_id)
        if state is None:   # known (expected, remembered) but not heard from in this process's life
            return NodeReading(
                node_id=node_id, address=address, connected=False, has_replica=False, stale=True,
                state=state_name(None, True, in_flight), geometry=None, epoch=0, sequence=0, checksum=0,
                key_count=0, capacity=0, set_bits=0, lag_s=None, delta_bytes=0, snapshots=0, stats=None,
                counters=counters)
        job = self._monitor.in_flight.get(node_id)
        heard = state.last_heard_at
        sync_counters = state.counters
        stale = node_id not in inputs.fresh
        return NodeReading(
            node_id=node_id, address=address, connected=state.connected, has_replica=state.has_replica,
            stale=stale, state=state_name(state, stale, in_flight),
            geometry=state.geometry, epoch=state.epoch, sequence=state.sequence, checksum=state.checksum,
            key_count=state.key_count, capacity=state.capacity, set_bits=inputs.set_bits.get(node_id, 0),
            lag_s=None if heard is None else max(0.0, now - heard), delta_bytes=sync_counters.delta_bytes,
            snapshots=sync_counters.snapshots_installed, stats=state.stats, counters=counters,
            snapshot_bytes=sync_counters.snapshot_bytes,
            rebuild_age_s=None if job is None else max(0.0, now - job.started_at))


@dataclass(frozen=True)
class _PassInputs:
    """What every node's reading needs, read once per pass under the lock."""

    policy: Policy
    fresh: set[str]
    set_bits: dict[str, int]
    counters: dict[str, NodeCounters]
