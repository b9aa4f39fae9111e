"""FilterSync servicer: the thin gRPC shell of the coordinator's sync protocol object.

Per stream: check the peer's identity and stream count (shardsieve/security.py) and every
message's limits (shardsieve/limits.py), feed the message to CoordinatorSync through the
coordinator shell (one lock; the shell dispatches the events), and send the replies. Each
stream has a reader thread and an outbox queue its response generator drains; the outbox of a
node's current stream is also where `send` puts messages for that node (rebuild requests).

It is also the transport's event subscriber: an unlisted node's stream ends.
"""

from __future__ import annotations

import itertools
import logging
import queue
import threading
import time
from typing import Any, Callable, Iterator, Sequence

import grpc

from shardsieve.coordinator.shell import CoordinatorShell
from shardsieve.limits import SyncLimits, check_node_message
from shardsieve.security import NodeAuthorizer, PeerIdentity, StreamLimiter, peer_identity
from shardsieve.sync.coordinator_side import NodeUnlisted, SyncEvent
from shardsieve.sync.errors import SyncError
from shardsieve.v1 import sync_pb2, sync_pb2_grpc

log = logging.getLogger("shardsieve.coordinator.sync")

_END = object()


class _Failure:
    """Ends the stream it is put on with this status."""

    def __init__(self, code: grpc.StatusCode, message: str) -> None:
        self.code = code
        self.message = message


class _Stream:
    """One FilterSync stream: its peer, its outbox, and its node once the Hello was taken
    (set and read under the shell's lock)."""

    def __init__(self, stream_id: int, who: PeerIdentity) -> None:
        self.stream_id = stream_id
        self.who = who
        self.outbox: queue.Queue[Any] = queue.Queue()
        self.node_id: str | None = None


class SyncService(sync_pb2_grpc.FilterSyncServicer):
    def __init__(self, shell: CoordinatorShell, *, clock: Callable[[], float] = time.monotonic,
                 delta_bytes: Callable[[int], None] | None = None, authorizer: NodeAuthorizer | None = None,
                 limiter: StreamLimiter | None = None, limits: SyncLimits | None = None) -> None:
        """delta_bytes(n): counts the payload bytes of each delta received (a metric)."""
        self.shell = shell
        # identity checks, per-peer stream limit and message limits: shardsieve/security.py, limits.py
        self.authorizer = authorizer or NodeAuthorizer("open")
        self.limiter = limiter or StreamLimiter(1 << 30)
        self.limits = limits or SyncLimits()
        self.clock = clock
        self._delta_bytes = delta_bytes
        self._ids = itertools.count(1)
        # node id -> outbox / identity key of its current stream; changed under the shell's lock
        self._outbox: dict[str, queue.Queue[Any]] = {}
        self._identity: dict[str, str] = {}
        self._stopping = threading.Event()

    # -- the transport's side of the coordinator -----------------------------------------------------
    def send(self, messages: Sequence[sync_pb2.CoordinatorMessage]) -> None:
        """Put each message on its node's current stream (call with the shell's lock held, in the
        same hold that made the protocol object produce them: the node is connected then)."""
        with self.shell.lock:
            for msg in messages:
                self._outbox[msg.node_id].put(msg)

    def on_event(self, event: SyncEvent) -> None:
        """An unlisted node's stream ends; if the node is in fact running it reconnects as new."""
        if isinstance(event, NodeUnlisted):
            outbox = self._outbox.pop(event.node_id, None)
            self._identity.pop(event.node_id, None)
            if outbox is not None:
                outbox.put(_Failure(grpc.StatusCode.ABORTED,
                                    f"this coordinator unlisted node {event.node_id!r} (an operator unlisted it); "
                                    "reconnecting registers it as a new node"))

    def stop(self) -> None:
        self._stopping.set()
        with self.shell.lock:
            boxes = list(self._outbox.values())
        for box in boxes:
            box.put(_END)

    # -- the stream ----------------------------------------------------------------------------------
    def Stream(self, request_iterator: Iterator[sync_pb2.NodeMessage],
               context: grpc.ServicerContext) -> Iterator[sync_pb2.CoordinatorMessage]:
        stream_id = next(self._ids)
        who = peer_identity(context)
        if not self.limiter.acquire(who.host):
            log.warning("sync stream refused: too many streams from one peer",
                        extra={"peer": who.describe(), "limit": self.limiter.limit})
            context.abort(grpc.StatusCode.RESOURCE_EXHAUSTED,
                          f"{who.host} already has {self.limiter.limit} sync streams open here "
                          "(setting max-streams-per-peer)")
        try:
            yield from self._serve(_Stream(stream_id, who), request_iterator, context)
        finally:
            self.limiter.release(who.host)

    def _refusal(self, node_id: str, who: PeerIdentity) -> str | None:
        """Why `who` may not open node_id's stream (None: allowed). Called under the shell's lock."""
        reason = self.authorizer.refusal(node_id, who)
        if reason is None and node_id in self._outbox and \
                self._identity.get(node_id) != self.authorizer.identity_key(who):
            reason = (f"node {node_id!r} is connected with another identity; a second stream must carry the "
                      "same identity (reconnect takeover)")
        return reason

    def _feed(self, stream: _Stream, msg: sync_pb2.NodeMessage) -> bool:
        """One message into the protocol object; its replies onto this stream. False: the stream
        was refused (a _Failure is queued)."""
        check_node_message(msg, self.limits)
        now = self.clock()
        with self.shell.lock:
            if stream.node_id is not None:
                result = self.shell.receive(stream.node_id, stream.stream_id, msg, now)
            else:
                if msg.WhichOneof("body") != "hello":
                    stream.outbox.put(_Failure(grpc.StatusCode.FAILED_PRECONDITION,
                                               "the first message of a sync stream must be a Hello"))
                    return False
                node_id = msg.hello.node_id
                refusal = self._refusal(node_id, stream.who)
                if refusal is not None:
                    log.warning("sync stream refused: identity", extra={
                        "node_id": node_id, "peer": stream.who.describe(), "reason": refusal})
                    stream.outbox.put(_Failure(grpc.StatusCode.PERMISSION_DENIED, refusal))
                    return False
                result = self.shell.open(stream.stream_id, msg.hello, now)
                stream.node_id = node_id
                self._outbox[node_id] = stream.outbox
                self._identity[node_id] = self.authorizer.identity_key(stream.who)
                log.info("sync stream opened", extra={"node_id": node_id, "stream": stream.stream_id,
                                                       "address": msg.hello.storage_address,
                                                       "epoch": msg.hello.epoch, "sequence": msg.hello.sequence})
            for reply in result.replies:
                stream.outbox.put(reply)
        if self._delta_bytes is not None and msg.WhichOneof("body") == "delta":
            self._delta_bytes(len(msg.delta.payload))
        return True

    def _serve(self, stream: _Stream, request_iterator: Iterator[sync_pb2.NodeMessage],
               context: grpc.ServicerContext) -> Iterator[sync_pb2.CoordinatorMessage]:

        def reader() -> None:
            try:
                for msg in request_iterator:
                    if not self._feed(stream, msg):
                        return
                stream.outbox.put(_END)
            except SyncError as exc:
                code = getattr(grpc.StatusCode, exc.grpc_status_name, grpc.StatusCode.FAILED_PRECONDITION)
                log.warning("sync stream refused", extra={"node_id": stream.node_id, "peer": stream.who.describe(),
                                                          "error": str(exc)})
                stream.outbox.put(_Failure(code, str(exc)))
            except grpc.RpcError:
                stream.outbox.put(_END)   # the node went away
            except Exception as exc:  # noqa: BLE001 - log, end this stream, keep serving others
                log.exception("sync stream failed", extra={"node_id": stream.node_id})
                stream.outbox.put(_Failure(grpc.StatusCode.INTERNAL, f"coordinator error: {exc}"))

        thread = threading.Thread(target=reader, name=f"sync-{stream.stream_id}", daemon=True)
        thread.start()
        try:
            while context.is_active() and not self._stopping.is_set():
                try:
                    item = stream.outbox.get(timeout=0.5)
                except queue.Empty:
                    continue
                if item is _END:
                    break
                if isinstance(item, _Failure):
                    context.abort(item.code, item.message)
                yield item
        finally:
            with self.shell.lock:
                node_id = stream.node_id
                if node_id is not None:
                    self.shell.close(node_id, stream.stream_id, self.clock())
                    if self._outbox.get(node_id) is stream.outbox:
                        del self._outbox[node_id]
                        self._identity.pop(node_id, None)
            if node_id is not None:
                log.info("sync stream closed", extra={"node_id": node_id, "stream": stream.stream_id})
