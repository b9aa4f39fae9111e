"""The coordinator's state owners and their readers, wired together without any I/O.

`wire_state` builds the protocol object (the one owner of every node's state) over the
replicas, the shell that runs it under one lock, and the subscribers that follow its events
in this order: membership, hints, accounting, saturation monitor
(docs/architecture.md#how-events-flow). The daemon adds the metrics and the stream transport
as later subscribers, and the services on top; tests and benchmarks use the same wiring.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Mapping

from shardsieve.coordinator.accounting import Accounting
from shardsieve.coordinator.candidates import CandidateFinder
from shardsieve.coordinator.hints import HintTable
from shardsieve.coordinator.membership import Membership
from shardsieve.coordinator.policy import LivePolicy, Policy
from shardsieve.coordinator.readings import Readings
from shardsieve.coordinator.replicas import Replicas
from shardsieve.coordinator.routing_index import RoutingIndex
from shardsieve.coordinator.saturation import SaturationMonitor
from shardsieve.coordinator.shell import CoordinatorShell
from shardsieve.sync.coordinator_side import CoordinatorSync, CoordinatorSyncConfig, ReplicaSink


@dataclass(frozen=True)
class CoordinatorState:
    """Every part of a coordinator that holds or reads fleet state (no sockets, no threads)."""

    replicas: Replicas
    shell: CoordinatorShell
    policy: LivePolicy
    membership: Membership
    hints: HintTable
    accounting: Accounting
    monitor: SaturationMonitor
    readings: Readings
    candidates: CandidateFinder


def wire_state(policy: Policy, *, expected: Mapping[str, str] | None = None, state_dir: Path | None = None,
               max_hints: int = 1_000_000, locate_threads: int = 0, monitor: SaturationMonitor | None = None,
               index: RoutingIndex | None = None,
               sync_config: CoordinatorSyncConfig | None = None,
               sink_tap: Callable[[ReplicaSink], ReplicaSink] | None = None) -> CoordinatorState:
    """sink_tap: wraps the replicas as CoordinatorSync's sink (the replica feed's tap,
    coordinator/replica_feed.py); None: CoordinatorSync writes to the replicas directly."""
    replicas = Replicas(index if index is not None else RoutingIndex(locate_threads))
    sync = CoordinatorSync(replicas if sink_tap is None else sink_tap(replicas), sync_config)
    shell = CoordinatorShell(sync)
    live_policy = LivePolicy(policy, shell.lock)
    membership = Membership(expected, state_dir)
    hints = HintTable(max_hints)
    accounting = Accounting()
    monitor = monitor or SaturationMonitor()
    for subscriber in (membership.on_event, hints.on_event, accounting.on_event, monitor.on_event):
        shell.subscribe(subscriber)
    readings = Readings(shell, membership, replicas, accounting, monitor, hints, live_policy)
    candidates = CandidateFinder(replicas, shell, membership, hints, live_policy)
    return CoordinatorState(replicas, shell, live_policy, membership, hints, accounting, monitor, readings,
                            candidates)
