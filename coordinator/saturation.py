"""Saturation monitor: decide which node filters to rebuild (grow or shrink), and when.

A plain object driven by ticks: `tick(now, nodes, policy, at=...)` takes a reading of every
synced node's filter and returns the decisions taken (with the numbers behind them) and the
rebuilds to request. Two clocks, never mixed: `now` is monotonic seconds and every duration
(rebuild timeout, cooldown, shrink grace) is measured on it, so a wall-clock step (NTP, an
operator) neither fires nor holds back a timeout; `at` is wall-clock Unix seconds, only
stamped on the decisions for people. coordinator/operations.py sends the requests over the nodes' sync streams and keeps
the decisions for the admin API. The monitor subscribes to the sync events only to drop a
unlisted node. Not thread-safe: the coordinator calls it under its one lock.

A node is saturated when (a) its predicted FPR fill^k is above ratio x target, (b) the lower
end of the Wilson 95% interval of its observed FPR is above ratio x target, or (c) it holds
more keys than its filter was sized for. A saturated node is rebuilt at growth x keys; a node
holding fewer than shrink_below x capacity keys is rebuilt smaller when that gives a smaller
ladder step. At most max_concurrent_rebuilds run at once, fleet-wide.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from shardsieve.coordinator.policy import Policy
from shardsieve.coordinator.routing_index import MEMORY_OVERHEAD_PER_NODE, SLACK_DIVISOR
from shardsieve.geometry import Geometry, GeometryError, geometry_for
from shardsieve.intervals import wilson_interval
from shardsieve.sizing import fill_fpr
from shardsieve.snapshot import MAX_CHUNK_BYTES
from shardsieve.sync.coordinator_side import NodeUnlisted, SyncEvent


@dataclass(frozen=True)
class FilterReading:
    """What the monitor needs to know about one node's filter at one tick."""

    node_id: str
    epoch: int
    key_count: int
    capacity: int
    fill: float
    hashes: int
    bits: int
    lookups_checked: int = 0
    false_positives: int = 0
    fresh: bool = True            # stream up, replica current, heard from lately: only such nodes are rebuilt

    @property
    def predicted_fpr(self) -> float:
        return fill_fpr(self.fill, self.hashes)


@dataclass(frozen=True)
class Decision:
    at: float                     # wall-clock Unix seconds, for people (Admin.Decisions at_unix); no duration
    node_id: str
    action: str                   # "flag", "rebuild", "shrink", "skip", "done"
    detail: str


@dataclass(frozen=True)
class RebuildPlan:
    node_id: str
    capacity: int
    target_fpr: float
    geometry: Geometry | None
    reason: str
    queued: bool = False          # waits for a free rebuild slot (the coordinator starts it then)
    refused: str = ""             # why it cannot be done at all (nothing starts); "" when it can
    replica_bytes_after: int = 0  # the routing index's memory once this filter replaced the old one

    @property
    def filter_bytes(self) -> int:
        """Bytes of the new filter (m/8): on the node, in the snapshot, and in every replica."""
        return self.geometry.byte_size if self.geometry is not None else 0


@dataclass(frozen=True)
class RebuildLimits:
    """What this coordinator can take from a rebuilt filter: its sync limits (a larger filter
    would be refused on the stream, stranding the node's rebuild) and its memory cap."""

    max_filter_bits: int = 1 << 34
    max_snapshot_chunks: int = 4096
    max_replica_bytes: int = 0       # the routing index's memory cap; 0: none


def rebuild_refusal(node: FilterReading, geometry: Geometry | None, capacity: int, target_fpr: float,
                    limits: RebuildLimits, replica_bytes: int) -> tuple[str, int]:
    """Why a rebuild of `node` to (capacity, target) must not start ("" when it may), and the
    routing index's memory after it. Checked before anything is asked of the node."""
    if not node.fresh:
        return (f"node {node.node_id} is stale or disconnected: a rebuild needs its live sync stream "
                "(shardsieve status shows why)"), replica_bytes
    if geometry is None:
        return (f"capacity {capacity} at target {target_fpr:g} needs a filter above the largest geometry "
                "(2^40 bits); give a smaller --capacity or a larger --fpr"), replica_bytes
    # the index keeps at most (1 + 1/SLACK_DIVISOR) x m/8 per node plus a fixed overhead (routing_index.py)
    after = (replica_bytes - (node.bits + 7) // 8
             + geometry.byte_size + geometry.byte_size // SLACK_DIVISOR + MEMORY_OVERHEAD_PER_NODE)
    if geometry.bits > limits.max_filter_bits:
        return (f"the new filter has {geometry.bits} bits ({geometry.byte_size} bytes); this coordinator "
                f"accepts at most {limits.max_filter_bits} bits (setting max-filter-bits), so it would refuse "
                "the node's stream; give a smaller --capacity or raise max-filter-bits on every coordinator"), after
    chunks = -(-geometry.byte_size // MAX_CHUNK_BYTES)
    if chunks > limits.max_snapshot_chunks:
        return (f"the new filter's snapshot takes up to {chunks} chunks of {MAX_CHUNK_BYTES} bytes; this "
                f"coordinator accepts at most {limits.max_snapshot_chunks} (setting max-snapshot-chunks)"), after
    if limits.max_replica_bytes and after > limits.max_replica_bytes:
        return (f"replicas would take {after} bytes after it, above this coordinator's cap of "
                f"{limits.max_replica_bytes} (setting max-replica-bytes)"), after
    return "", after


@dataclass
class _InFlight:
    started_at: float             # monotonic seconds
    epoch_before: int
    capacity: int
    reason: str
    bits_before: int = 0          # the filter size before, and the one asked for: a new epoch at
    bits_planned: int = 0         # the old size after asking for another means the node gave up


@dataclass
class TickResult:
    decisions: list[Decision] = field(default_factory=list)
    rebuilds: list[RebuildPlan] = field(default_factory=list)


def saturation_reasons(node: FilterReading, policy: Policy) -> list[str]:
    """Why a node is saturated, each reason with its numbers; empty when it is not."""
    limit = policy.saturation_ratio * policy.target_fpr
    reasons = []
    if node.predicted_fpr > limit:
        reasons.append(f"predicted FPR {node.predicted_fpr:.4g} (fill {node.fill:.4f}^k={node.hashes}) "
                       f"> {policy.saturation_ratio:g} x target {policy.target_fpr:g} = {limit:.4g}")
    low, high = wilson_interval(node.false_positives, node.lookups_checked)
    if node.lookups_checked and low > limit:
        reasons.append(f"observed FPR {node.false_positives}/{node.lookups_checked} has Wilson 95% lower bound "
                       f"{low:.4g} > {limit:.4g}")
    if node.key_count > node.capacity:
        reasons.append(f"keys {node.key_count} > capacity {node.capacity}")
    return reasons


def grow_capacity(key_count: int, policy: Policy) -> int:
    return max(policy.min_capacity, math.ceil(policy.growth * key_count))


def _geometry(capacity: int, target: float) -> Geometry | None:
    try:
        return geometry_for(capacity, target)
    except (GeometryError, ValueError):
        return None


class SaturationMonitor:
    """Flags saturated nodes and schedules rebuilds under a fleet-wide concurrency limit."""

    def __init__(self, rebuild_timeout_s: float = 120.0, cooldown_s: float = 5.0,
                 shrink_grace_s: float = 300.0, limits: RebuildLimits = RebuildLimits()) -> None:
        self.limits = limits
        self.rebuild_timeout_s = rebuild_timeout_s
        self.cooldown_s = cooldown_s
        # A node must stay under the shrink threshold this long before it is shrunk: a node that
        # just started empty (or is being filled) keeps the capacity its operator gave it.
        self.shrink_grace_s = shrink_grace_s
        self._below_since: dict[str, float] = {}
        self.in_flight: dict[str, _InFlight] = {}
        self.flagged: dict[str, list[str]] = {}
        self._last_done: dict[str, float] = {}
        self._last_note: dict[str, str] = {}
        # operator requests waiting for a slot, oldest first: started by tick() as slots free up
        self.queued: dict[str, RebuildPlan] = {}

    # -- pure assessments ---------------------------------------------------------------------
    def shrink_plan(self, node: FilterReading, policy: Policy) -> RebuildPlan | None:
        if node.capacity <= policy.min_capacity or node.key_count >= policy.shrink_below * node.capacity:
            return None
        capacity = grow_capacity(node.key_count, policy)
        geometry = _geometry(capacity, policy.target_fpr)
        if geometry is None or geometry.bits >= node.bits:
            return None
        return RebuildPlan(node.node_id, capacity, policy.target_fpr, geometry,
                           f"shrink: keys {node.key_count} < {policy.shrink_below:g} x capacity {node.capacity}; "
                           f"{node.bits} -> {geometry.bits} bits")

    def grow_plan(self, node: FilterReading, policy: Policy, reasons: list[str]) -> RebuildPlan:
        capacity = grow_capacity(node.key_count, policy)
        return RebuildPlan(node.node_id, capacity, policy.target_fpr, _geometry(capacity, policy.target_fpr),
                           "; ".join(reasons) + f"; rebuild at {policy.growth:g} x {node.key_count} keys = {capacity}")

    def plan(self, nodes: list[FilterReading], policy: Policy, *, node_ids: list[str] | None = None,
             flagged: bool = False, capacity: int = 0, target_fpr: float = 0.0,
             replica_bytes: int = 0) -> list[RebuildPlan]:
        """Rebuilds an operator asked for (named nodes, or every flagged one): each one refused with
        the reason when it must not start (a node already rebuilding or not fresh, a size past a
        limit of this coordinator, rebuild_refusal), else queued past the concurrency limit.
        KeyError names nodes without a verified replica. replica_bytes: the index's memory now."""
        by_id = {n.node_id: n for n in nodes}
        chosen: list[FilterReading] = []
        if node_ids:
            missing = [i for i in node_ids if i not in by_id]
            if missing:
                raise KeyError(", ".join(missing))
            chosen = [by_id[i] for i in node_ids]
        if flagged:
            chosen += [n for n in nodes if saturation_reasons(n, policy) and n not in chosen]
        target = target_fpr or policy.target_fpr
        free = max(0, policy.max_concurrent_rebuilds - len(self.in_flight) - len(self.queued))
        plans = []
        for n in chosen:
            cap = capacity or grow_capacity(n.key_count, policy)
            reasons = saturation_reasons(n, policy)
            reason = "operator request" + (": " + "; ".join(reasons) if reasons else "")
            geometry = _geometry(cap, target)
            refused, after = rebuild_refusal(n, geometry, cap, target, self.limits, replica_bytes)
            if not refused and (n.node_id in self.in_flight or n.node_id in self.queued):
                refused = f"node {n.node_id} is already rebuilding (or waiting for a slot); see shardsieve status"
            queued = not refused and free <= 0
            if not refused and not queued:
                free -= 1
                replica_bytes = after   # the next plan of this request counts this one
            plans.append(RebuildPlan(n.node_id, cap, target, geometry, reason, queued, refused, after))
        return plans

    def enqueue(self, plan: RebuildPlan) -> None:
        """Hold an operator's plan until a rebuild slot is free (tick starts it)."""
        self.queued[plan.node_id] = plan

    # -- state changes ------------------------------------------------------------------------
    def started(self, plan: RebuildPlan, epoch_before: int, now: float, bits_before: int = 0) -> None:
        """A rebuild was asked for at monotonic time `now`; it holds a slot until done or timed out."""
        self.in_flight[plan.node_id] = _InFlight(now, epoch_before, plan.capacity, plan.reason, bits_before,
                                                 plan.geometry.bits if plan.geometry is not None else 0)

    def drop_node(self, node_id: str) -> None:
        self.in_flight.pop(node_id, None)
        self.queued.pop(node_id, None)
        self._below_since.pop(node_id, None)
        self.flagged.pop(node_id, None)

    def on_event(self, event: SyncEvent) -> None:
        if isinstance(event, NodeUnlisted):
            self.drop_node(event.node_id)

    def tick(self, now: float, nodes: list[FilterReading], policy: Policy, *, at: float,
             replica_bytes: int = 0) -> TickResult:
        """Assess every node; finish, time out, flag and start rebuilds: operators' queued ones
        first, then the monitor's own. Returns what it decided. `now`: monotonic seconds (every
        duration); `at`: wall-clock seconds stamped on decisions; replica_bytes: the index's
        memory now (for the memory cap)."""
        out = TickResult()
        by_id = {n.node_id: n for n in nodes}
        # Rebuilds in flight: done when the node moved to a later epoch; give up after the timeout.
        for node_id, job in list(self.in_flight.items()):
            node = by_id.get(node_id)
            if node is not None and node.epoch > job.epoch_before:
                del self.in_flight[node_id]
                self._last_done[node_id] = now
                if job.bits_planned and job.bits_planned != job.bits_before and node.bits == job.bits_before:
                    # a fresh epoch at the old size: the node gave the rebuild up (docs/node.md, "Rebuild")
                    out.decisions.append(Decision(at, node_id, "skip",
                                                  f"the node gave the rebuild to {job.bits_planned} bits up; it goes on "
                                                  f"with its {node.bits}-bit filter at epoch {node.epoch} (its log "
                                                  "says why, e.g. a coordinator refusing that size)"))
                    continue
                out.decisions.append(Decision(at, node_id, "done",
                                              f"epoch {job.epoch_before} -> {node.epoch}; capacity {node.capacity}, "
                                              f"{node.key_count} keys, predicted FPR {node.predicted_fpr:.4g} "
                                              f"(target {policy.target_fpr:g}) after {now - job.started_at:.1f}s"))
            elif now - job.started_at > self.rebuild_timeout_s:
                del self.in_flight[node_id]
                self._last_done[node_id] = now   # retry only after the cooldown
                out.decisions.append(Decision(at, node_id, "skip",
                                              f"rebuild to capacity {job.capacity} not verified within "
                                              f"{self.rebuild_timeout_s:g}s; slot released"))
        # Operators' requests waiting for a slot, oldest first; one whose node went away or went
        # stale is dropped with a decision saying so (asking again starts it anew).
        for node_id, plan in list(self.queued.items()):
            if len(self.in_flight) >= policy.max_concurrent_rebuilds:
                break
            del self.queued[node_id]
            node = by_id.get(node_id)
            refused = "node unlisted or without a replica" if node is None else rebuild_refusal(
                node, plan.geometry, plan.capacity, plan.target_fpr, self.limits, replica_bytes)[0]
            if refused:
                out.decisions.append(Decision(at, node_id, "skip", f"queued rebuild dropped: {refused}"))
                continue
            out.decisions.append(Decision(at, node_id, "rebuild", f"capacity {plan.capacity} at target "
                                          f"{plan.target_fpr:g}; geometry {plan.geometry}: {plan.reason} (was queued)"))
            self.started(plan, node.epoch, now, node.bits)
            out.rebuilds.append(plan)
        # Flag transitions.
        candidates: list[RebuildPlan] = []
        for node in nodes:
            reasons = saturation_reasons(node, policy)
            was = node.node_id in self.flagged
            if reasons and not was:
                out.decisions.append(Decision(at, node.node_id, "flag", "; ".join(reasons)))
            if reasons:
                self.flagged[node.node_id] = reasons
            else:
                self.flagged.pop(node.node_id, None)
            if node.node_id in self.in_flight or node.node_id in self.queued or not node.fresh:
                continue
            if now - self._last_done.get(node.node_id, -math.inf) < self.cooldown_s:
                continue
            if reasons:
                self._below_since.pop(node.node_id, None)
                candidates.append(self.grow_plan(node, policy, reasons))
            else:
                shrink = self.shrink_plan(node, policy)
                if shrink is None:
                    self._below_since.pop(node.node_id, None)
                elif now - self._below_since.setdefault(node.node_id, now) >= self.shrink_grace_s:
                    candidates.append(shrink)
        if not policy.auto_rebuild:
            return out
        # Start as many as the fleet-wide limit allows; most keys-over-capacity first.
        candidates.sort(key=lambda p: -(by_id[p.node_id].key_count / max(1, by_id[p.node_id].capacity)))
        for plan in candidates:
            node = by_id[plan.node_id]
            refused, after = rebuild_refusal(node, plan.geometry, plan.capacity, plan.target_fpr, self.limits,
                                             replica_bytes)
            if refused:
                if self._last_note.get(plan.node_id) != refused:
                    out.decisions.append(Decision(at, plan.node_id, "skip", f"not rebuilt: {refused}; {plan.reason}"))
                    self._last_note[plan.node_id] = refused
                continue
            if len(self.in_flight) >= policy.max_concurrent_rebuilds:
                note = (f"queued: {len(self.in_flight)} of {policy.max_concurrent_rebuilds} rebuild slots busy "
                        f"({', '.join(sorted(self.in_flight))})")
                if self._last_note.get(plan.node_id) != "queued":
                    out.decisions.append(Decision(at, plan.node_id, "skip", note + "; " + plan.reason))
                    self._last_note[plan.node_id] = "queued"
                continue
            self._last_note.pop(plan.node_id, None)
            action = "shrink" if plan.reason.startswith("shrink") else "rebuild"
            geo = f"; geometry {plan.geometry}" if plan.geometry else ""
            out.decisions.append(Decision(at, plan.node_id, action,
                                          f"capacity {plan.capacity} at target {plan.target_fpr:g}{geo}: {plan.reason}"))
            self.started(plan, node.epoch, now, node.bits)
            out.rebuilds.append(plan)
            replica_bytes = after
        return out
