"""FilterSync servicer: drives shardsieve.sync.coordinator_side.CoordinatorSync from gRPC streams.

Each stream gets a reader thread that feeds node messages into the protocol object (under one
lock: the object is not thread-safe) and an outbox queue the response generator drains. The
outbox of a node's current stream is also where rebuild requests go. After every message the
node's record in the fleet is refreshed from the protocol object's view (freshness, hints).
"""

from __future__ import annotations

import itertools
import logging
import queue
import threading
import time
from typing import Any, Callable, Iterator

import grpc

from shardsieve.coordinator.fleet import Fleet
from shardsieve.limits import SyncLimits, check_node_message
from shardsieve.security import NodeAuthorizer, PeerIdentity, StreamLimiter, peer_identity
from shardsieve.sync.coordinator_side import CoordinatorSync, CoordinatorSyncConfig
from shardsieve.sync.errors import SyncError
from shardsieve.v1 import sync_pb2, sync_pb2_grpc

log = logging.getLogger("shardsieve.coordinator.sync")

_END = object()


class _Failure:
    def __init__(self, code: grpc.StatusCode, message: str) -> None:
        self.code = code
        self.message = message


class NodeConnected(Exception):
    """ForgetNode without force for a node whose sync stream is open."""


class SyncService(sync_pb2_grpc.FilterSyncServicer):
    def __init__(self, fleet: Fleet, sync: CoordinatorSync | None = None, *,
                 clock: Callable[[], float] = time.monotonic, metrics: Any = None,
                 authorizer: NodeAuthorizer | None = None, limiter: StreamLimiter | None = None,
                 limits: SyncLimits | None = None) -> None:
        self.fleet = fleet
        # identity checks, per-peer stream limit and message limits: shardsieve/security.py, limits.py
        self.authorizer = authorizer or NodeAuthorizer("open")
        self.limiter = limiter or StreamLimiter(1 << 30)
        self.limits = limits or SyncLimits()
        self._identity: dict[str, str] = {}     # node id -> identity key of its current stream
        self.sync = sync or CoordinatorSync(
            fleet, CoordinatorSyncConfig(max_snapshot_bytes=self.limits.max_snapshot_bytes))
        self.lock = threading.Lock()
        self.clock = clock
        self.metrics = metrics
        self._ids = itertools.count(1)
        self._outbox: dict[str, queue.Queue[Any]] = {}
        self._stopping = threading.Event()
        self._snapshots_seen: dict[str, int] = {}
        # Views are taken under self.lock but handed to the fleet after it is released; a node
        # forgotten in between must not come back from such a view. Each forget bumps the
        # node's generation, and a view is observed only if the generation it was taken in is
        # still current (checked and applied under _observe_lock, which forget also holds).
        self._forgets: dict[str, int] = {}
        self._observe_lock = threading.Lock()

    def _observe(self, view: Any, generation: int) -> None:
        with self._observe_lock:
            if self._forgets.get(view.node_id, 0) == generation:
                self.fleet.observe(view)

    # -- called by the daemon ---------------------------------------------------------------------
    def send_rebuild(self, node_id: str, capacity: int, target_fpr: float, reason: str) -> None:
        """Queue a RebuildRequest on node_id's stream; KeyError if it has none, ValueError on bad sizes."""
        with self.lock:
            outbox = self._outbox.get(node_id)
            if outbox is None:
                raise KeyError(f"node {node_id!r} has no open sync stream")
            msg = self.sync.request_rebuild(node_id, capacity, target_fpr, reason, self.clock())
            view = self.sync.node(node_id)
            generation = self._forgets.get(node_id, 0)
        outbox.put(msg)
        if view is not None:
            self._observe(view, generation)
        if self.metrics is not None:
            self.metrics.rebuilds.labels("shrink" if reason.startswith("shrink") else "rebuild").inc()

    def refresh(self) -> None:
        """Re-read every node's view (the clock moved; e.g. before a status reply)."""
        with self.lock:
            views = [(v, self._forgets.get(v.node_id, 0)) for v in self.sync.nodes()]
        for v, generation in views:
            self._observe(v, generation)

    def forget(self, node_id: str, force: bool = False) -> dict[str, Any]:
        """Decommission node_id: drop it from the protocol object and the fleet. Raises KeyError
        for a node this coordinator does not know, NodeConnected when its stream is open and
        force is not set (nothing changes then). With force an open stream is ended; a node
        that is still running reconnects as a new node."""
        with self.lock:
            known = node_id in self.sync.node_ids() or any(r.node_id == node_id for r in self.fleet.records())
            if not known:
                raise KeyError(node_id)
            connected = self.sync.is_connected(node_id)
            if connected and not force:
                raise NodeConnected(node_id)
            had_replica = self.sync.position(node_id) is not None or node_id in self.fleet.indexed_nodes()
            self.sync.forget(node_id)     # (its replica leaves the index through the sink)
            outbox = self._outbox.pop(node_id, None)
            self._identity.pop(node_id, None)
            self._snapshots_seen.pop(node_id, None)
            with self._observe_lock:
                self._forgets[node_id] = self._forgets.get(node_id, 0) + 1
                result = self.fleet.forget(node_id) or {
                    "node_id": node_id, "address": "", "was_connected": connected, "had_replica": False,
                    "hints_dropped": 0, "key_count": 0}
        result["was_connected"] = connected
        result["had_replica"] = had_replica
        if outbox is not None:
            outbox.put(_Failure(grpc.StatusCode.ABORTED,
                                f"this coordinator forgot node {node_id!r} (operator decommission); "
                                "reconnecting registers it as a new node"))
        return result

    def stop(self) -> None:
        self._stopping.set()
        with self.lock:
            boxes = list(self._outbox.values())
        for box in boxes:
            box.put(_END)

    # -- the stream ----------------------------------------------------------------------------------
    def Stream(self, request_iterator: Iterator[sync_pb2.NodeMessage], context: grpc.ServicerContext) -> Iterator[sync_pb2.CoordinatorMessage]:
        stream_id = next(self._ids)
        outbox: queue.Queue[Any] = queue.Queue()
        state: dict[str, Any] = {"node": None}
        who = peer_identity(context)
        if not self.limiter.acquire(who.host):
            log.warning("sync stream refused: too many streams from one peer",
                        extra={"peer": who.describe(), "limit": self.limiter.limit})
            context.abort(grpc.StatusCode.RESOURCE_EXHAUSTED,
                          f"{who.host} already has {self.limiter.limit} sync streams open here "
                          "(setting max-streams-per-peer)")
        try:
            yield from self._serve(stream_id, outbox, state, who, request_iterator, context)
        finally:
            self.limiter.release(who.host)

    def _refusal(self, node_id: str, who: PeerIdentity) -> str | None:
        """Why `who` may not open node_id's stream (None: allowed). Called under self.lock."""
        reason = self.authorizer.refusal(node_id, who)
        if reason is None and node_id in self._outbox and \
                self._identity.get(node_id) != self.authorizer.identity_key(who):
            reason = (f"node {node_id!r} is connected with another identity; a second stream must carry the "
                      "same identity (reconnect takeover)")
        return reason

    def _serve(self, stream_id: int, outbox: queue.Queue[Any], state: dict[str, Any], who: PeerIdentity,
               request_iterator: Iterator[sync_pb2.NodeMessage],
               context: grpc.ServicerContext) -> Iterator[sync_pb2.CoordinatorMessage]:

        def reader() -> None:
            try:
                for msg in request_iterator:
                    check_node_message(msg, self.limits)
                    now = self.clock()
                    with self.lock:
                        node_id = state["node"]
                        if node_id is None:
                            if msg.WhichOneof("body") != "hello":
                                outbox.put(_Failure(grpc.StatusCode.FAILED_PRECONDITION,
                                                    "the first message of a sync stream must be a Hello"))
                                return
                            refusal = self._refusal(msg.hello.node_id, who)
                            if refusal is not None:
                                log.warning("sync stream refused: identity", extra={
                                    "node_id": msg.hello.node_id, "peer": who.describe(), "reason": refusal})
                                outbox.put(_Failure(grpc.StatusCode.PERMISSION_DENIED, refusal))
                                return
                            out = self.sync.open(stream_id, msg.hello, now)
                            node_id = state["node"] = msg.hello.node_id
                            self._outbox[node_id] = outbox
                            self._identity[node_id] = self.authorizer.identity_key(who)
                            log.info("sync stream opened", extra={"node_id": node_id, "stream": stream_id,
                                                                   "address": msg.hello.storage_address,
                                                                   "epoch": msg.hello.epoch,
                                                                   "sequence": msg.hello.sequence})
                        else:
                            out = self.sync.receive(node_id, stream_id, msg, now)
                        view = self.sync.node(node_id)
                        generation = self._forgets.get(node_id, 0)
                    if self.metrics is not None and msg.WhichOneof("body") == "delta":
                        self.metrics.delta_bytes.inc(len(msg.delta.payload))
                    if view is not None:
                        self._observe(view, generation)
                        if self.metrics is not None:
                            installed = view.counters.snapshots_installed
                            if installed > self._snapshots_seen.get(node_id, 0):
                                self.metrics.snapshots.inc(installed - self._snapshots_seen.get(node_id, 0))
                                self._snapshots_seen[node_id] = installed
                    for m in out:
                        outbox.put(m)
                outbox.put(_END)
            except SyncError as exc:
                code = getattr(grpc.StatusCode, exc.grpc_status_name, grpc.StatusCode.FAILED_PRECONDITION)
                log.warning("sync stream refused", extra={"node_id": state["node"], "peer": who.describe(),
                                                          "error": str(exc)})
                outbox.put(_Failure(code, str(exc)))
            except grpc.RpcError:
                outbox.put(_END)   # the node went away
            except Exception as exc:  # noqa: BLE001 - log, end this stream, keep serving others
                log.exception("sync stream failed", extra={"node_id": state["node"]})
                outbox.put(_Failure(grpc.StatusCode.INTERNAL, f"coordinator error: {exc}"))

        thread = threading.Thread(target=reader, name=f"sync-{stream_id}", daemon=True)
        thread.start()
        try:
            while context.is_active() and not self._stopping.is_set():
                try:
                    item = outbox.get(timeout=0.5)
                except queue.Empty:
                    continue
                if item is _END:
                    break
                if isinstance(item, _Failure):
                    context.abort(item.code, item.message)
                yield item
        finally:
            node_id = state["node"]
            if node_id is not None:
                with self.lock:
                    self.sync.close(node_id, stream_id, self.clock())
                    if self._outbox.get(node_id) is outbox:
                        del self._outbox[node_id]
                        self._identity.pop(node_id, None)
                    view = self.sync.node(node_id)
                    generation = self._forgets.get(node_id, 0)
                if view is not None:
                    self._observe(view, generation)
                log.info("sync stream closed", extra={"node_id": node_id, "stream": stream_id})
