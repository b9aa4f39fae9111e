"""Admin servicer: fleet status, node detail, rebuilds (with dry-run plans), policy, decisions,
unlisting a node gone for good (UnlistNode).

A thin adapter: figures come from coordinator/readings.py, actions and the decision log from
coordinator/operations.py, the policy from its holder. The admin token is checked before a
call gets here, by the TokenGuard interceptor (shardsieve/security.py).
"""

from __future__ import annotations

import logging
import time
from typing import Callable

import grpc

from shardsieve.coordinator.operations import NodeConnected, Operations
from shardsieve.coordinator.policy import LivePolicy, Policy, PolicyError
from shardsieve.coordinator.readings import NodeReading, Readings
from shardsieve.coordinator.saturation import Decision, saturation_reasons
from shardsieve.fanout import avoided_fanout
from shardsieve.intervals import wilson_interval
from shardsieve.limits import node_id_problem
from shardsieve.v1 import admin_pb2, admin_pb2_grpc

log = logging.getLogger("shardsieve.coordinator.admin")


def node_status(node: NodeReading, policy: Policy) -> admin_pb2.NodeStatus:
    c = node.counters
    reading = node.filter_reading()
    reasons = saturation_reasons(reading, policy) if reading is not None else []
    low, high = wilson_interval(c.false_positives, c.lookups_checked) if c else (0.0, 1.0)
    stats = node.stats
    return admin_pb2.NodeStatus(
        node_id=node.node_id, address=node.address, connected=node.connected, stale=node.stale,
        saturated=bool(reasons), saturation_reasons=reasons,
        geometry=node.geometry.to_proto() if node.geometry else None,
        epoch=node.epoch, sequence=node.sequence, checksum=node.checksum, key_count=node.key_count,
        capacity=node.capacity, fill=node.fill, predicted_fpr=node.predicted_fpr,
        observed_fpr=c.observed_fpr if c else 0.0, observed_fpr_interval=admin_pb2.WilsonInterval(low=low, high=high),
        lookups_checked=c.lookups_checked if c else 0, probes=c.probes if c else 0,
        wasted_probes=c.wasted_probes if c else 0,
        lag_ms=node.lag_s * 1000.0 if node.lag_s is not None else 0.0,
        state=node.state, rebuild_progress=float(stats.rebuild_progress) if stats else 0.0,
        rebuild_phase=stats.rebuild_phase if stats else "", delta_bytes=node.delta_bytes, snapshots=node.snapshots,
        reads_missed_reported=int(stats.reads_missed) if stats else 0, implausible_fill=bool(node.implausibility))


def _decision_proto(d: Decision) -> admin_pb2.Decision:
    return admin_pb2.Decision(at_unix=d.at, node_id=d.node_id, action=d.action, detail=d.detail)


def policy_proto(p: Policy) -> admin_pb2.Policy:
    return admin_pb2.Policy(target_fpr=p.target_fpr, saturation_ratio=p.saturation_ratio, growth=p.growth,
                            shrink_below=p.shrink_below, max_concurrent_rebuilds=p.max_concurrent_rebuilds,
                            auto_rebuild=p.auto_rebuild, stale_after_s=p.stale_after_s, mode=p.mode,
                            min_capacity=p.min_capacity)


class AdminService(admin_pb2_grpc.AdminServicer):
    def __init__(self, coordinator_id: str, readings: Readings, operations: Operations, policy: LivePolicy,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.coordinator_id = coordinator_id
        self.readings = readings
        self.operations = operations
        self.policy = policy
        self.clock = clock

    def _known(self) -> str:
        return ", ".join(self.readings.node_ids()) or "none"

    @staticmethod
    def _refuse_bad_ids(node_ids: list[str], context: grpc.ServicerContext) -> None:
        """INVALID_ARGUMENT, naming the rule, for an id outside the node id alphabet (docs/node.md,
        "Node ids"): no node can have it, so the request is malformed rather than about an
        unknown node."""
        for node_id in node_ids:
            problem = node_id_problem(node_id)
            if problem:
                context.abort(grpc.StatusCode.INVALID_ARGUMENT, f"{problem}; nothing changed")

    def FleetStatus(self, request: admin_pb2.FleetStatusRequest, context: grpc.ServicerContext) -> admin_pb2.FleetStatusReply:
        fleet = self.readings.fleet(self.clock())
        totals = fleet.totals
        low, high = wilson_interval(totals.false_positives, totals.lookups_checked)
        return admin_pb2.FleetStatusReply(
            coordinator_id=self.coordinator_id, mode=fleet.policy.mode,
            nodes=[node_status(n, fleet.policy) for n in fleet.nodes], lookups=totals.lookups,
            probes=totals.probes, wasted_probes=totals.wasted_probes,
            avoided_fanout=avoided_fanout(probes=totals.probes, lookups=totals.lookups, nodes=len(fleet.nodes)),
            observed_fpr=totals.false_positives / totals.lookups_checked if totals.lookups_checked else 0.0,
            observed_fpr_interval=admin_pb2.WilsonInterval(low=low, high=high),
            rebuilds_in_progress=fleet.rebuilds_in_progress)

    def NodeDetail(self, request: admin_pb2.NodeDetailRequest, context: grpc.ServicerContext) -> admin_pb2.NodeDetailReply:
        self._refuse_bad_ids([request.node_id], context)
        node = self.readings.node(request.node_id, self.clock())
        if node is None:
            context.abort(grpc.StatusCode.NOT_FOUND, f"no node {request.node_id!r} is known (known: {self._known()})")
        recent = self.operations.decisions(50, node_id=request.node_id)
        return admin_pb2.NodeDetailReply(status=node_status(node, self.policy.current),  # type: ignore[arg-type]
                                         recent_decisions=[_decision_proto(d) for d in recent])

    def Rebuild(self, request: admin_pb2.RebuildCommand, context: grpc.ServicerContext) -> admin_pb2.RebuildReply:
        if not request.node_ids and not request.flagged:
            context.abort(grpc.StatusCode.INVALID_ARGUMENT, "name at least one node id or set 'flagged'")
        self._refuse_bad_ids(list(request.node_ids), context)
        if request.target_fpr and not 0.0 < request.target_fpr < 1.0:
            context.abort(grpc.StatusCode.INVALID_ARGUMENT,
                          f"target_fpr {request.target_fpr} must be strictly between 0 and 1 (0: policy target)")
        try:
            plans = self.operations.plan_rebuilds(list(request.node_ids), request.flagged, request.capacity,
                                                  request.target_fpr)
        except KeyError as exc:
            synced = ", ".join(self.operations.synced_nodes()) or "none"
            context.abort(grpc.StatusCode.NOT_FOUND, f"no synced node named {exc.args[0]} (synced nodes: {synced})")
        bad = next((p for p in plans if p.geometry is None), None)
        if bad is not None:
            context.abort(grpc.StatusCode.INVALID_ARGUMENT,
                          f"capacity {bad.capacity} at target {bad.target_fpr} gives no valid filter geometry")
        if not request.dry_run:
            self.operations.rebuild(plans)
        return admin_pb2.RebuildReply(dry_run=request.dry_run, plan=[
            admin_pb2.PlannedRebuild(node_id=p.node_id, capacity=p.capacity, target_fpr=p.target_fpr,
                                     geometry=p.geometry.to_proto() if p.geometry else None, reason=p.reason,
                                     queued=p.queued) for p in plans])

    def GetPolicy(self, request: admin_pb2.PolicyGetRequest, context: grpc.ServicerContext) -> admin_pb2.Policy:
        return policy_proto(self.policy.current)

    def SetPolicy(self, request: admin_pb2.PolicySetRequest, context: grpc.ServicerContext) -> admin_pb2.Policy:
        try:
            new = self.policy.update(dict(request.values))
        except PolicyError as exc:
            context.abort(grpc.StatusCode.INVALID_ARGUMENT, str(exc))
        log.info("policy changed", extra={"changes": ", ".join(f"{k}={v}" for k, v in sorted(request.values.items()))})
        return policy_proto(new)

    def Decisions(self, request: admin_pb2.DecisionsRequest, context: grpc.ServicerContext) -> admin_pb2.DecisionsReply:
        return admin_pb2.DecisionsReply(decisions=[_decision_proto(d) for d in self.operations.decisions(request.limit)])

    def UnlistNode(self, request: admin_pb2.UnlistNodeRequest, context: grpc.ServicerContext) -> admin_pb2.UnlistNodeReply:
        node_id = request.node_id
        if not node_id:
            context.abort(grpc.StatusCode.INVALID_ARGUMENT, "name the node id to unlist")
        self._refuse_bad_ids([node_id], context)
        try:
            gone = self.operations.unlist(node_id, request.force)
        except KeyError:
            context.abort(grpc.StatusCode.NOT_FOUND,
                          f"no node {node_id!r} is known (known: {self._known()}); nothing changed")
        except NodeConnected:
            context.abort(grpc.StatusCode.FAILED_PRECONDITION,
                          f"node {node_id!r} is connected (its sync stream is open), so it is not gone; nothing "
                          "changed. Stop it first, or set force (`shardsieve unlist --force`) to unlist it anyway (it "
                          "comes back as a new node if it reconnects)")
        return admin_pb2.UnlistNodeReply(node_id=node_id, was_connected=gone.was_connected,
                                         had_replica=gone.had_replica, hints_dropped=gone.hints_dropped,
                                         key_count=gone.key_count, address=gone.address)
