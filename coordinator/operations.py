"""What the coordinator does to its fleet, in one place: rebuilds (asked by an operator or by the
saturation monitor), unlisting a node, the monitor's periodic pass, and the decision log.

Each action runs under the coordinator's lock, goes through CoordinatorSync (via the shell, so
its events reach every subscriber) and sends what the node must hear on the node's stream
(`send`, the stream transport of coordinator/sync_service.py). Every decision is logged with
its numbers and kept for Admin.Decisions (docs/coordinator.md, "Accounting and saturation").
"""

from __future__ import annotations

import collections
import logging
import time
from dataclasses import dataclass
from typing import Callable, Sequence

from shardsieve.coordinator.hints import Hint, HintTable
from shardsieve.coordinator.membership import Membership, is_stale
from shardsieve.coordinator.policy import LivePolicy
from shardsieve.coordinator.readings import Readings
from shardsieve.coordinator.saturation import Decision, FilterReading, RebuildPlan, SaturationMonitor
from shardsieve.coordinator.shell import CoordinatorShell
from shardsieve.v1 import sync_pb2

log = logging.getLogger("shardsieve.coordinator.operations")

Send = Callable[[Sequence[sync_pb2.CoordinatorMessage]], None]


class NodeConnected(Exception):
    """UnlistNode without force for a node whose sync stream is open."""


@dataclass(frozen=True)
class Unlisted:
    """What an unlisted node left behind (the UnlistNode reply)."""

    node_id: str
    address: str
    was_connected: bool
    had_replica: bool
    hints_dropped: int
    key_count: int


class Operations:
    """Rebuilds, unlisting, the monitor's pass and the decision log."""

    def __init__(self, shell: CoordinatorShell, readings: Readings, monitor: SaturationMonitor, policy: LivePolicy,
                 hints: HintTable, membership: Membership, send: Send, *, hint_max_age_s: float = 300.0,
                 max_decisions: int = 1000, clock: Callable[[], float] = time.monotonic,
                 wall: Callable[[], float] = time.time) -> None:
        self._shell = shell
        self._readings = readings
        self._monitor = monitor
        self._policy = policy
        self._hints = hints
        self._membership = membership
        self._send = send
        self.hint_max_age_s = hint_max_age_s
        self._decisions: collections.deque[Decision] = collections.deque(maxlen=max_decisions)
        self._clock = clock   # monotonic: every duration (hint ages, rebuild timeout, grace, cooldown)
        self._wall = wall     # wall-clock: only the decisions' timestamps shown to people

    # -- the decision log ---------------------------------------------------------------------------
    def record(self, decisions: Sequence[Decision]) -> None:
        with self._shell.lock:
            for d in decisions:
                self._decisions.append(d)
                log.info("monitor decision", extra={"node_id": d.node_id, "action": d.action, "detail": d.detail})

    def decisions(self, limit: int = 0, node_id: str | None = None) -> list[Decision]:
        """The latest decisions, oldest first (limit 0: all kept), of one node or all."""
        with self._shell.lock:
            items = [d for d in self._decisions if node_id is None or d.node_id == node_id]
        return items[-limit:] if limit else items

    # -- rebuilds -----------------------------------------------------------------------------------
    def plan_rebuilds(self, node_ids: Sequence[str], flagged: bool, capacity: int = 0,
                      target_fpr: float = 0.0) -> list[RebuildPlan]:
        """An operator's rebuild plan, each one checked against this coordinator's limits and
        memory cap (refused with the reason), queued past the concurrency limit. KeyError names
        nodes without a verified replica; `synced_nodes` lists the ones with."""
        with self._shell.lock:
            return self._monitor.plan(self._readings.filters(self._clock()), self._policy.current,
                                      node_ids=list(node_ids), flagged=flagged, capacity=capacity,
                                      target_fpr=target_fpr, replica_bytes=self._readings.replica_bytes())

    def synced_nodes(self) -> list[str]:
        return sorted(f.node_id for f in self._readings.filters(self._clock()))

    def rebuild(self, plans: Sequence[RebuildPlan]) -> None:
        """Carry out an operator's plan, none of it refused (the caller checked): start what has a
        slot, hold the rest in the monitor's queue (started as slots free up)."""
        assert not any(p.refused for p in plans), "refused plans are never carried out"
        with self._shell.lock:
            for plan in plans:
                if plan.queued:
                    self._monitor.enqueue(plan)
                    self.record([Decision(self._wall(), plan.node_id, "queued",
                                          f"capacity {plan.capacity} at target {plan.target_fpr:g}: waits for a rebuild "
                                          f"slot (policy max-concurrent-rebuilds); {plan.reason}")])
                elif self.start_rebuild(plan, self._clock()):
                    self.record([Decision(self._wall(), plan.node_id, "rebuild",
                                          f"capacity {plan.capacity} at target {plan.target_fpr:g}; "
                                          f"geometry {plan.geometry}: {plan.reason}")])

    def start_rebuild(self, plan: RebuildPlan, now: float) -> bool:
        """Ask the node to rebuild over its sync stream and hold a rebuild slot for it until the
        monitor sees the new epoch (or gives up; `now` is monotonic, the timeout runs from it).
        False, with a skip decision, when it cannot be asked (not connected, bad sizes)."""
        with self._shell.lock:
            try:
                result = self._shell.request_rebuild(plan.node_id, plan.capacity, plan.target_fpr, plan.reason, now)
            except (KeyError, ValueError) as exc:
                self._monitor.drop_node(plan.node_id)
                self.record([Decision(self._wall(), plan.node_id, "skip", f"rebuild not sent: {exc}")])
                return False
            self._send(result.replies)
            if plan.node_id not in self._monitor.in_flight:
                state = self._shell.node(plan.node_id)
                geometry = state.geometry if state is not None else None
                self._monitor.started(plan, state.epoch if state is not None else 0, now,
                                      geometry.bits if geometry is not None else 0)
            return True

    # -- unlisting -----------------------------------------------------------------------------------
    def unlist(self, node_id: str, force: bool = False) -> Unlisted:
        """Unlist node_id (gone for good): every part drops it (replica, hints, accounting, monitor, the
        membership file) and a connected node's stream ends. KeyError: not a known node;
        NodeConnected: its stream is open and force is not set. Either way nothing changes."""
        with self._shell.lock:
            if not self._membership.knows(node_id):
                raise KeyError(node_id)
            state = self._shell.node(node_id)
            if state is not None and state.connected and not force:
                raise NodeConnected(node_id)
            address = self._membership.address(node_id) or ""
            hints = self._hints.count(node_id)
            (gone,) = self._shell.unlist(node_id).events
            unlisted = Unlisted(node_id, address, gone.was_connected, gone.had_replica, hints, gone.key_count)
            self.record([Decision(self._wall(), node_id, "unlist",
                                  f"unlisted by an operator{' (forced while connected)' if gone.was_connected else ''}"
                                  f"; {gone.key_count} keys last reported, {hints} hints dropped")])
        log.info("node unlisted", extra={"node_id": node_id, "address": address, "was_connected": gone.was_connected,
                                          "had_replica": gone.had_replica, "hints_dropped": hints,
                                          "key_count": gone.key_count})
        return unlisted

    # -- the monitor's pass -------------------------------------------------------------------------
    def expire_hints(self, now: float) -> list[Hint]:
        """Drop hints older than hint-max-age-s (last resort: their change never arrived, e.g. the
        node's sync stalls). Each one whose write the replica still lacks is logged with its
        numbers; in safe mode that node is listed anyway while it is stale. Returns those."""
        with self._shell.lock:
            lacking = self._hints.expire(now, self.hint_max_age_s, self._shell.position)
            policy = self._policy.current
            for hint in lacking:
                replica = self._shell.position(hint.node_id)
                stale = is_stale(self._shell.node(hint.node_id), policy, now)
                log.warning("read-your-writes hint expired before the replica held the write", extra={
                    "node_id": hint.node_id, "key": hint.key[:64].hex(), "key_bytes": len(hint.key),
                    "hint_epoch": hint.position[0], "hint_sequence": hint.position[1],
                    "old_epoch": hint.old[0] if hint.old else None,
                    "old_sequence": hint.old[1] if hint.old else None,
                    "replica_epoch": replica[0] if replica else None,
                    "replica_sequence": replica[1] if replica else None,
                    "age_s": round(now - (hint.added_at or now), 3), "max_age_s": self.hint_max_age_s,
                    "node_stale": stale, "mode": policy.mode, "still_listed": stale and policy.mode == "safe"})
        return lacking

    def tick(self, readings: list[FilterReading] | None = None) -> None:
        """One pass of the monitor: expire old hints, assess every synced node, record the
        decisions and start the rebuilds it chose. `readings`: the nodes' filter readings when the
        caller gathered them already (a large fleet's in parts, between which the event loop runs:
        see CoordinatorDaemon.monitor_pass); a node unlisted since is left out."""
        with self._shell.lock:
            now = self._clock()
            self.expire_hints(now)
            if readings is None:
                readings = self._readings.filters(now)
            else:
                readings = [r for r in readings if self._membership.knows(r.node_id)]
            result = self._monitor.tick(now, readings, self._policy.current, at=self._wall(),
                                        replica_bytes=self._readings.replica_bytes())
            self.record(result.decisions)
            for plan in result.rebuilds:
                self.start_rebuild(plan, now)
