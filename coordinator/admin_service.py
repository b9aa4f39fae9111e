"""Admin servicer: fleet status, node detail, rebuilds (with dry-run plans), policy, decisions,
unlisting a node gone for good (UnlistNode).

A thin adapter: figures come from coordinator/readings.py, actions and the decision log from
coordinator/operations.py, the policy from its holder. The admin token is checked before a
call gets here, by the TokenGuard interceptor (shardsieve/security.py). Each call's work runs
through `CoordinatorShell.call` (on the event loop unless the coordinator lock is taken); a
refusal is raised as `Refused` there and becomes the call's status here.
"""

from __future__ import annotations

import logging
import time
from typing import Awaitable, Callable, TypeVar

import grpc

from shardsieve.coordinator.operations import NodeConnected, Operations
from shardsieve.coordinator.policy import LivePolicy, Policy, PolicyError
from shardsieve.coordinator.readings import NodeReading, Readings
from shardsieve.coordinator.saturation import Decision, saturation_reasons
from shardsieve.coordinator.shell import CoordinatorShell
from shardsieve.fanout import avoided_fanout
from shardsieve.intervals import wilson_interval
from shardsieve.limits import node_id_problem
from shardsieve.v1 import admin_pb2, admin_pb2_grpc

log = logging.getLogger("shardsieve.coordinator.admin")
T = TypeVar("T")


class Refused(Exception):
    """Ends an Admin call with `code` and `details` (nothing changed)."""

    def __init__(self, code: grpc.StatusCode, details: str) -> None:
        super().__init__(details)
        self.code = code
        self.details = details


async def _nothing_in_flight(_node_id: str) -> None:
    return None


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
                 shell: CoordinatorShell, *, settled: Callable[[str], Awaitable[None]] = _nothing_in_flight,
                 clock: Callable[[], float] = time.monotonic) -> None:
        """settled(node_id): waits until no snapshot install of that node is in flight (the sync
        transport's), so an unlisting never overtakes one."""
        self.coordinator_id = coordinator_id
        self.readings = readings
        self.operations = operations
        self.policy = policy
        self.shell = shell
        self.settled = settled
        self.clock = clock

    async def _answer(self, context: grpc.aio.ServicerContext, fn: Callable[[], T]) -> T:
        try:
            return await self.shell.call(fn)
        except Refused as exc:
            await context.abort(exc.code, exc.details)
        raise AssertionError("unreachable")   # context.abort raises

    def _known(self) -> str:
        return ", ".join(self.readings.node_ids()) or "none"

    @staticmethod
    def _refuse_bad_ids(node_ids: list[str]) -> None:
        """INVALID_ARGUMENT, naming the rule, for an id outside the node id alphabet (docs/node.md,
        "Node ids"): no node can have it, so the request is malformed rather than about an
        unknown node."""
        for node_id in node_ids:
            problem = node_id_problem(node_id)
            if problem:
                raise Refused(grpc.StatusCode.INVALID_ARGUMENT, f"{problem}; nothing changed")

    async def FleetStatus(self, request: admin_pb2.FleetStatusRequest,
                          context: grpc.aio.ServicerContext) -> admin_pb2.FleetStatusReply:
        return await self._answer(context, self.fleet_status)

    def fleet_status(self) -> admin_pb2.FleetStatusReply:
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

    async def NodeDetail(self, request: admin_pb2.NodeDetailRequest,
                         context: grpc.aio.ServicerContext) -> admin_pb2.NodeDetailReply:
        def detail() -> admin_pb2.NodeDetailReply:
            self._refuse_bad_ids([request.node_id])
            node = self.readings.node(request.node_id, self.clock())
            if node is None:
                raise Refused(grpc.StatusCode.NOT_FOUND, f"no node {request.node_id!r} is known (known: {self._known()})")
            recent = self.operations.decisions(50, node_id=request.node_id)
            return admin_pb2.NodeDetailReply(status=node_status(node, self.policy.current),
                                             recent_decisions=[_decision_proto(d) for d in recent])
        return await self._answer(context, detail)

    async def Rebuild(self, request: admin_pb2.RebuildCommand,
                      context: grpc.aio.ServicerContext) -> admin_pb2.RebuildReply:
        return await self._answer(context, lambda: self.rebuild(request))

    def rebuild(self, request: admin_pb2.RebuildCommand) -> admin_pb2.RebuildReply:
        if not request.node_ids and not request.flagged:
            raise Refused(grpc.StatusCode.INVALID_ARGUMENT, "name at least one node id or set 'flagged'")
        self._refuse_bad_ids(list(request.node_ids))
        if request.target_fpr and not 0.0 < request.target_fpr < 1.0:
            raise Refused(grpc.StatusCode.INVALID_ARGUMENT,
                          f"target_fpr {request.target_fpr} must be strictly between 0 and 1 (0: policy target)")
        try:
            plans = self.operations.plan_rebuilds(list(request.node_ids), request.flagged, request.capacity,
                                                  request.target_fpr)
        except KeyError as exc:
            synced = ", ".join(self.operations.synced_nodes()) or "none"
            raise Refused(grpc.StatusCode.NOT_FOUND,
                          f"no synced node named {exc.args[0]} (synced nodes: {synced})") from None
        refused = [p for p in plans if p.refused]
        if refused and not request.dry_run:
            # all or nothing: a rebuild this coordinator cannot take is never started (docs/coordinator.md)
            raise Refused(grpc.StatusCode.FAILED_PRECONDITION, "nothing was started: " + "; ".join(
                f"{p.node_id}: {p.refused}" for p in refused))
        if not request.dry_run:
            self.operations.rebuild(plans)
        return admin_pb2.RebuildReply(dry_run=request.dry_run, plan=[
            admin_pb2.PlannedRebuild(node_id=p.node_id, capacity=p.capacity, target_fpr=p.target_fpr,
                                     geometry=p.geometry.to_proto() if p.geometry else None, reason=p.reason,
                                     queued=p.queued, refused=p.refused, filter_bytes=p.filter_bytes,
                                     replica_bytes_after=p.replica_bytes_after) for p in plans])

    async def GetPolicy(self, request: admin_pb2.PolicyGetRequest,
                        context: grpc.aio.ServicerContext) -> admin_pb2.Policy:
        return policy_proto(self.policy.current)

    async def SetPolicy(self, request: admin_pb2.PolicySetRequest,
                        context: grpc.aio.ServicerContext) -> admin_pb2.Policy:
        def update() -> admin_pb2.Policy:
            try:
                new = self.policy.update(dict(request.values))
            except PolicyError as exc:
                raise Refused(grpc.StatusCode.INVALID_ARGUMENT, str(exc)) from None
            log.info("policy changed", extra={"changes": ", ".join(f"{k}={v}" for k, v in sorted(request.values.items()))})
            return policy_proto(new)
        return await self._answer(context, update)

    async def Decisions(self, request: admin_pb2.DecisionsRequest,
                        context: grpc.aio.ServicerContext) -> admin_pb2.DecisionsReply:
        return await self._answer(context, lambda: admin_pb2.DecisionsReply(
            decisions=[_decision_proto(d) for d in self.operations.decisions(request.limit)]))

    async def UnlistNode(self, request: admin_pb2.UnlistNodeRequest,
                         context: grpc.aio.ServicerContext) -> admin_pb2.UnlistNodeReply:
        if not request.node_id:
            await context.abort(grpc.StatusCode.INVALID_ARGUMENT, "name the node id to unlist")
        await self.settled(request.node_id)
        return await self._answer(context, lambda: self.unlist(request))

    def unlist(self, request: admin_pb2.UnlistNodeRequest) -> admin_pb2.UnlistNodeReply:
        node_id = request.node_id
        if not node_id:
            raise Refused(grpc.StatusCode.INVALID_ARGUMENT, "name the node id to unlist")
        self._refuse_bad_ids([node_id])
        try:
            gone = self.operations.unlist(node_id, request.force)
        except KeyError:
            raise Refused(grpc.StatusCode.NOT_FOUND,
                          f"no node {node_id!r} is known (known: {self._known()}); nothing changed") from None
        except NodeConnected:
            raise Refused(grpc.StatusCode.FAILED_PRECONDITION,
                          f"node {node_id!r} is connected (its sync stream is open), so it is not gone; nothing "
                          "changed. Stop it first, or set force (`shardsieve unlist --force`) to unlist it anyway (it "
                          "comes back as a new node if it reconnects)") from None
        return admin_pb2.UnlistNodeReply(node_id=node_id, was_connected=gone.was_connected,
                                         had_replica=gone.had_replica, hints_dropped=gone.hints_dropped,
                                         key_count=gone.key_count, address=gone.address)
