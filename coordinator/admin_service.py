"""Admin servicer: fleet status, node detail, rebuilds (with dry-run plans), policy, decisions,
decommissioning (ForgetNode).

When a token is configured every call must carry "authorization: Bearer <token>" metadata;
the comparison is constant-time (security.tokens_equal) and the token is never logged.
"""

from __future__ import annotations

import logging
import time
from typing import Any, Callable

import grpc

from shardsieve.coordinator.fleet import Fleet, NodeRecord
from shardsieve.coordinator.policy import Policy, PolicyError
from shardsieve.coordinator.saturation import Decision, RebuildPlan, saturation_reasons
from shardsieve import security
from shardsieve.fanout import avoided_fanout
from shardsieve.intervals import wilson_interval
from shardsieve.limits import fill_implausibility
from shardsieve.v1 import admin_pb2, admin_pb2_grpc

log = logging.getLogger("shardsieve.coordinator.admin")


class TokenCheck:
    """Constant-time bearer-token check of a call's metadata; no token configured -> open."""

    def __init__(self, token: str) -> None:
        self._token = token.encode()

    def allowed(self, metadata: object) -> bool:
        if not self._token:
            return True
        return security.tokens_equal(security.bearer_token(metadata), self._token)  # type: ignore[arg-type]


def _status(fleet: Fleet, rec: NodeRecord, now: float) -> admin_pb2.NodeStatus:
    counters, _ = fleet.accounting.snapshot()
    c = counters.get(rec.node_id)
    view = next((v for v in fleet.views(now) if v.node_id == rec.node_id), None)
    reasons = saturation_reasons(view, fleet.policy) if view is not None else []
    low, high = wilson_interval(c.false_positives, c.lookups_checked) if c else (0.0, 1.0)
    stats = rec.stats
    key_count, capacity = rec.key_count, rec.capacity
    fill = rec.fill
    # applied but flagged: a fill the declared key count cannot produce (shardsieve/limits.py)
    implausible = bool(rec.geometry and rec.synced and fill_implausibility(
        rec.set_bits, rec.geometry.bits, rec.geometry.hashes, key_count))
    return admin_pb2.NodeStatus(
        node_id=rec.node_id, address=rec.address, connected=rec.connected, stale=fleet.is_stale(rec, now),
        saturated=bool(reasons), saturation_reasons=reasons,
        geometry=rec.geometry.to_proto() if rec.geometry else None,
        epoch=rec.epoch, sequence=rec.sequence, checksum=rec.checksum, key_count=key_count, capacity=capacity, fill=fill,
        predicted_fpr=rec.predicted_fpr, observed_fpr=c.observed_fpr if c else 0.0,
        observed_fpr_interval=admin_pb2.WilsonInterval(low=low, high=high),
        lookups_checked=c.lookups_checked if c else 0, probes=c.probes if c else 0,
        wasted_probes=c.wasted_probes if c else 0,
        lag_ms=max(0.0, (now - rec.last_progress) * 1000.0) if rec.last_progress > float("-inf") else 0.0,
        state=fleet.state_of(rec, now), rebuild_progress=float(stats.get("rebuild_progress", 0.0)),
        rebuild_phase=str(stats.get("rebuild_phase", "")), delta_bytes=rec.delta_bytes, snapshots=rec.snapshots,
        reads_missed_reported=int(stats.get("reads_missed", 0)), implausible_fill=implausible)


def _decision_proto(d: Decision) -> admin_pb2.Decision:
    return admin_pb2.Decision(at_unix=d.at, node_id=d.node_id, action=d.action, detail=d.detail)


def policy_proto(p: Policy) -> admin_pb2.Policy:
    return admin_pb2.Policy(target_fpr=p.target_fpr, saturation_ratio=p.saturation_ratio, growth=p.growth,
                            shrink_below=p.shrink_below, max_concurrent_rebuilds=p.max_concurrent_rebuilds,
                            auto_rebuild=p.auto_rebuild, stale_after_s=p.stale_after_s, mode=p.mode,
                            min_capacity=p.min_capacity)


class AdminService(admin_pb2_grpc.AdminServicer):
    def __init__(self, fleet: Fleet, coordinator_id: str, token: str,
                 start_rebuild: Callable[[RebuildPlan, float], None], clock: Callable[[], float] = time.monotonic,
                 wall: Callable[[], float] = time.time,
                 forget_node: Callable[[str, bool], dict[str, Any]] | None = None) -> None:
        """forget_node(node_id, force): the daemon passes SyncService.forget (KeyError: unknown,
        shardsieve.coordinator.sync_service.NodeConnected: refused); without it the fleet alone is used."""
        self.fleet = fleet
        self.forget_node = forget_node or self._forget_in_fleet
        self.coordinator_id = coordinator_id
        self._check = TokenCheck(token)
        self.start_rebuild = start_rebuild
        self.clock = clock
        self.wall = wall

    def set_token(self, token: str) -> None:
        """Require `token` from now on ('' : none); used when the token file is re-read."""
        self._check = TokenCheck(token)

    def _guard(self, context: grpc.ServicerContext) -> None:
        if not self._check.allowed(context.invocation_metadata()):
            context.abort(grpc.StatusCode.UNAUTHENTICATED,
                          "this coordinator requires 'authorization: Bearer <token>' metadata; the token was "
                          "missing or wrong")

    def FleetStatus(self, request: admin_pb2.FleetStatusRequest, context: grpc.ServicerContext) -> admin_pb2.FleetStatusReply:
        self._guard(context)
        now = self.clock()
        recs = sorted(self.fleet.records(), key=lambda r: r.node_id)
        _, totals = self.fleet.accounting.snapshot()
        low, high = wilson_interval(totals.false_positives, totals.lookups_checked)
        return admin_pb2.FleetStatusReply(
            coordinator_id=self.coordinator_id, mode=self.fleet.policy.mode,
            nodes=[_status(self.fleet, r, now) for r in recs], lookups=totals.lookups, probes=totals.probes,
            wasted_probes=totals.wasted_probes, avoided_fanout=avoided_fanout(probes=totals.probes, lookups=totals.lookups, nodes=len(recs)),
            observed_fpr=totals.false_positives / totals.lookups_checked if totals.lookups_checked else 0.0,
            observed_fpr_interval=admin_pb2.WilsonInterval(low=low, high=high),
            rebuilds_in_progress=len(self.fleet.monitor.in_flight))

    def NodeDetail(self, request: admin_pb2.NodeDetailRequest, context: grpc.ServicerContext) -> admin_pb2.NodeDetailReply:
        self._guard(context)
        rec = next((r for r in self.fleet.records() if r.node_id == request.node_id), None)
        if rec is None:
            known = ", ".join(sorted(r.node_id for r in self.fleet.records())) or "none"
            context.abort(grpc.StatusCode.NOT_FOUND, f"no node {request.node_id!r} is known (known: {known})")
        recent = [d for d in self.fleet.decisions if d.node_id == request.node_id][-50:]
        return admin_pb2.NodeDetailReply(status=_status(self.fleet, rec, self.clock()),  # type: ignore[arg-type]
                                         recent_decisions=[_decision_proto(d) for d in recent])

    def Rebuild(self, request: admin_pb2.RebuildCommand, context: grpc.ServicerContext) -> admin_pb2.RebuildReply:
        self._guard(context)
        if not request.node_ids and not request.flagged:
            context.abort(grpc.StatusCode.INVALID_ARGUMENT, "name at least one node id or set 'flagged'")
        if request.target_fpr and not 0.0 < request.target_fpr < 1.0:
            context.abort(grpc.StatusCode.INVALID_ARGUMENT,
                          f"target_fpr {request.target_fpr} must be strictly between 0 and 1 (0: policy target)")
        now = self.clock()
        views = self.fleet.views(now)
        try:
            plans = self.fleet.monitor.plan(views, self.fleet.policy, node_ids=list(request.node_ids),
                                            flagged=request.flagged, capacity=request.capacity,
                                            target_fpr=request.target_fpr)
        except KeyError as exc:
            synced = ", ".join(sorted(v.node_id for v in views)) or "none"
            context.abort(grpc.StatusCode.NOT_FOUND,
                          f"no synced node named {exc.args[0]} (synced nodes: {synced})")
        if plans and any(p.geometry is None for p in plans):
            bad = next(p for p in plans if p.geometry is None)
            context.abort(grpc.StatusCode.INVALID_ARGUMENT,
                          f"capacity {bad.capacity} at target {bad.target_fpr} gives no valid filter geometry")
        if not request.dry_run:
            for p in plans:
                if not p.queued:
                    self.start_rebuild(p, self.wall())
                    self.fleet.record_decisions([Decision(self.wall(), p.node_id, "rebuild",
                                                          f"capacity {p.capacity} at target {p.target_fpr:g}; "
                                                          f"geometry {p.geometry}: {p.reason}")])
        return admin_pb2.RebuildReply(dry_run=request.dry_run, plan=[
            admin_pb2.PlannedRebuild(node_id=p.node_id, capacity=p.capacity, target_fpr=p.target_fpr,
                                     geometry=p.geometry.to_proto() if p.geometry else None, reason=p.reason,
                                     queued=p.queued) for p in plans])

    def GetPolicy(self, request: admin_pb2.PolicyGetRequest, context: grpc.ServicerContext) -> admin_pb2.Policy:
        self._guard(context)
        return policy_proto(self.fleet.policy)

    def SetPolicy(self, request: admin_pb2.PolicySetRequest, context: grpc.ServicerContext) -> admin_pb2.Policy:
        self._guard(context)
        try:
            new = self.fleet.policy.updated(dict(request.values))
        except PolicyError as exc:
            context.abort(grpc.StatusCode.INVALID_ARGUMENT, str(exc))
        self.fleet.set_policy(new)
        log.info("policy changed", extra={"changes": ", ".join(f"{k}={v}" for k, v in sorted(request.values.items()))})
        return policy_proto(new)

    def Decisions(self, request: admin_pb2.DecisionsRequest, context: grpc.ServicerContext) -> admin_pb2.DecisionsReply:
        self._guard(context)
        items = list(self.fleet.decisions)
        if request.limit:
            items = items[-request.limit:]
        return admin_pb2.DecisionsReply(decisions=[_decision_proto(d) for d in items])

    def _forget_in_fleet(self, node_id: str, force: bool) -> dict[str, Any]:
        """ForgetNode without a sync service (in-process use): the fleet's record decides."""
        from shardsieve.coordinator.sync_service import NodeConnected

        rec = next((r for r in self.fleet.records() if r.node_id == node_id), None)
        if rec is None:
            raise KeyError(node_id)
        if rec.connected and not force:
            raise NodeConnected(node_id)
        result = self.fleet.forget(node_id)
        assert result is not None
        return result

    def ForgetNode(self, request: admin_pb2.ForgetNodeRequest, context: grpc.ServicerContext) -> admin_pb2.ForgetNodeReply:
        self._guard(context)
        from shardsieve.coordinator.sync_service import NodeConnected

        node_id = request.node_id
        if not node_id:
            context.abort(grpc.StatusCode.INVALID_ARGUMENT, "name the node id to forget")
        try:
            result = self.forget_node(node_id, request.force)
        except KeyError:
            known = ", ".join(sorted(r.node_id for r in self.fleet.records())) or "none"
            context.abort(grpc.StatusCode.NOT_FOUND, f"no node {node_id!r} is known (known: {known}); nothing changed")
        except NodeConnected:
            context.abort(grpc.StatusCode.FAILED_PRECONDITION,
                          f"node {node_id!r} is connected (its sync stream is open), so it is not gone; nothing "
                          "changed. Stop it first, or set force (`shardsieve forget --force`) to forget it anyway (it "
                          "comes back as a new node if it reconnects)")
        self.fleet.record_decisions([Decision(self.wall(), node_id, "forget",
                                              f"forgotten by an operator{' (forced while connected)' if result['was_connected'] else ''}; "
                                              f"{result['key_count']} keys last reported, {result['hints_dropped']} "
                                              "hints dropped")])
        return admin_pb2.ForgetNodeReply(node_id=node_id, was_connected=result["was_connected"],
                                         had_replica=result["had_replica"], hints_dropped=result["hints_dropped"],
                                         key_count=result["key_count"], address=result["address"])
