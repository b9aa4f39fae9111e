"""FilterSync servicer: the thin asyncio shell of the coordinator's sync protocol object.

Every stream runs in the shared pump (shardsieve/stream_pump.py) on the event loop; a stream
costs no thread. Per stream: admission (shardsieve/security.py `StreamAdmission`: all open
streams, streams still without a Hello, streams per peer host; a refused stream ends
RESOURCE_EXHAUSTED naming the limit and its setting), a Hello deadline (`hello_timeout_s`: a
stream that has not completed its Hello and authentication by then is closed), the peer's
identity, every message's limits (shardsieve/limits.py), then each message goes to
CoordinatorSync through the coordinator shell and the replies go back on the stream. The
outbox of a node's current stream is also where `send` puts messages for that node (rebuild
requests).

What is heavy leaves the loop: a complete snapshot is decoded and installed in a worker
thread and only the state commit runs on the loop (CoordinatorShell.run_install /
finish_install); until it committed, nothing else for that node is fed to the protocol object
(a second stream's Hello, the stream's close, an unlisting wait for it: `settled`). A very
large delta is handed to the shell in a worker thread too.

A second stream for a node id whose stream is open (the same identity: a reconnect) takes it
over: the coordinator logs a warning naming both peers and ends the old stream ABORTED, its
detail naming the new peer. The transport is also an event subscriber: an unlisted node's
stream ends.
"""

from __future__ import annotations

import asyncio
import itertools
import logging
import time
from typing import Any, Awaitable, Callable, Sequence

import grpc

from shardsieve.coordinator.shell import CoordinatorShell
from shardsieve.limits import LIMIT_METADATA_KEY, SyncLimits, check_node_message
from shardsieve.security import NodeAuthorizer, PeerIdentity, StreamAdmission, peer_address, peer_identity
from shardsieve.stream_pump import STOPPING, Outbox, StreamEnd, StreamRefused, pump
from shardsieve.sync.coordinator_side import NodeUnlisted, SnapshotInstall, StreamOpened, SyncEvent, SyncResult
from shardsieve.v1 import sync_pb2, sync_pb2_grpc

log = logging.getLogger("shardsieve.coordinator.sync")

HELLO_TIMEOUT_S = 5.0
# A delta with a payload this large is applied in a worker thread (its decode alone takes
# milliseconds: about 60 ns per changed position, measured with shardsieve/codec.py).
OFF_LOOP_DELTA_BYTES = 64 * 1024


class _Stream:
    """One FilterSync stream: its peer, its outbox, and its node once the Hello was taken
    (set on the loop under the shell's lock)."""

    def __init__(self, stream_id: int, who: PeerIdentity, peer: str) -> None:
        self.stream_id = stream_id
        self.who = who
        self.peer = peer                     # HOST:PORT of the other end, for logs
        self.outbox: Outbox[sync_pb2.CoordinatorMessage] = Outbox()
        self.node_id: str | None = None
        self.hello_timer: asyncio.TimerHandle | None = None


class SyncService(sync_pb2_grpc.FilterSyncServicer):
    def __init__(self, shell: CoordinatorShell, *, clock: Callable[[], float] = time.monotonic,
                 authorizer: NodeAuthorizer | None = None,
                 admission: StreamAdmission | None = None, limits: SyncLimits | None = None,
                 hello_timeout_s: float = HELLO_TIMEOUT_S) -> None:
        self.shell = shell
        # identity checks, stream admission and message limits: shardsieve/security.py, limits.py
        self.authorizer = authorizer or NodeAuthorizer("open")
        self.admission = admission or StreamAdmission()
        self.limits = limits or SyncLimits()
        self.hello_timeout_s = hello_timeout_s
        self.clock = clock
        self._ids = itertools.count(1)
        # node id -> its current stream and that stream's identity key; changed under the shell's lock
        self._current: dict[str, _Stream] = {}
        self._identity: dict[str, str] = {}
        self._open: set[_Stream] = set()                        # every stream being served (loop only)
        self._installing: dict[str, asyncio.Future[SyncResult]] = {}   # node id -> its install in flight
        self._tasks: set[asyncio.Future[Any]] = set()
        self._stopping = False

    # -- the transport's side of the coordinator -----------------------------------------------------
    def send(self, messages: Sequence[sync_pb2.CoordinatorMessage]) -> None:
        """Put each message on its node's current stream (call with the shell's lock held, in the
        same hold that made the protocol object produce them: the node is connected then)."""
        with self.shell.lock:
            for msg in messages:
                self._current[msg.node_id].outbox.send([msg])

    def on_event(self, event: SyncEvent) -> None:
        """An unlisted node's stream ends; if the node is in fact running it reconnects as new."""
        if isinstance(event, NodeUnlisted):
            stream = self._current.pop(event.node_id, None)
            self._identity.pop(event.node_id, None)
            if stream is not None:
                stream.outbox.end(StreamEnd(grpc.StatusCode.ABORTED,
                                            f"this coordinator unlisted node {event.node_id!r} (an operator unlisted "
                                            "it); reconnecting registers it as a new node"), now=True)

    async def settled(self, node_id: str) -> None:
        """Wait until no snapshot install of node_id is in flight (before unlisting it)."""
        pending = self._installing.get(node_id)
        if pending is not None:
            await asyncio.wait([pending])

    async def stop(self) -> None:
        """End every stream (status OK: the nodes reconnect elsewhere or later) and refuse new ones."""
        self._stopping = True
        for stream in list(self._open):
            stream.outbox.end(STOPPING, now=True)
        if self._tasks:
            await asyncio.wait(list(self._tasks), timeout=5.0)

    # -- the stream ----------------------------------------------------------------------------------
    async def Stream(self, request_iterator: Any, context: grpc.aio.ServicerContext) -> None:  # noqa: N802
        who = peer_identity(context)
        if self._stopping:
            await context.abort(grpc.StatusCode.UNAVAILABLE, "this coordinator is shutting down; reconnect later")
        refusal = self.admission.admit(who.host)
        if refusal is not None:
            log.warning("sync stream refused: limit", extra={"peer": who.describe(), "reason": refusal})
            await context.abort(grpc.StatusCode.RESOURCE_EXHAUSTED, refusal)
        stream = _Stream(next(self._ids), who, peer_address(context.peer() or ""))
        stream.hello_timer = asyncio.get_running_loop().call_later(self.hello_timeout_s, self._no_hello, stream)
        self._open.add(stream)
        try:
            end = await pump(read=context.read, write=context.write, handle=lambda msg: self._feed(stream, msg),
                             outbox=stream.outbox, on_close=lambda _end: self._closed(stream),
                             name=f"sync-{stream.stream_id}")
        finally:
            stream.hello_timer.cancel()
            self._open.discard(stream)
            self.admission.release(who.host, pending=stream.node_id is None)
        if not end.ok and end.code != grpc.StatusCode.CANCELLED:
            if end.code not in (grpc.StatusCode.ABORTED, grpc.StatusCode.DEADLINE_EXCEEDED,
                                grpc.StatusCode.PERMISSION_DENIED):   # those were logged where decided
                log.warning("sync stream refused", extra={"node_id": stream.node_id, "peer": who.describe(),
                                                          "error": end.describe()})
            if end.limit:   # structured, for the node to act on (shardsieve/limits.py)
                context.set_trailing_metadata(((LIMIT_METADATA_KEY, end.limit),))
            await context.abort(end.code, end.details)

    def _no_hello(self, stream: _Stream) -> None:
        """The Hello deadline passed: a stream that has not completed its Hello is closed."""
        if stream.node_id is None:
            self.admission.hello_timed_out()
            ms = int(self.hello_timeout_s * 1000)
            log.info("sync stream closed: no Hello in time", extra={"peer": stream.who.describe(), "timeout_ms": ms})
            stream.outbox.end(StreamEnd(grpc.StatusCode.DEADLINE_EXCEEDED,
                                        f"no Hello within {ms} ms of opening the stream (setting hello-timeout-ms); "
                                        "the stream is closed"), now=True)

    def _feed(self, stream: _Stream, msg: sync_pb2.NodeMessage) -> Awaitable[list[sync_pb2.CoordinatorMessage]]:
        """One message into the protocol object; returns the replies for this stream."""
        check_node_message(msg, self.limits)
        if stream.node_id is None:
            return self._hello(stream, msg)
        return self._receive(stream, stream.node_id, msg)

    async def _receive(self, stream: _Stream, node_id: str,
                       msg: sync_pb2.NodeMessage) -> list[sync_pb2.CoordinatorMessage]:
        large = msg.WhichOneof("body") == "delta" and len(msg.delta.payload) >= OFF_LOOP_DELTA_BYTES
        result = await self.shell.call(self.shell.receive, node_id, stream.stream_id, msg, self.clock(),
                                       off_loop=large)
        if result.install is None:
            return list(result.replies)
        installed = await self._install(node_id, result.install)
        return list(result.replies) + list(installed.replies)

    async def _install(self, node_id: str, job: SnapshotInstall) -> SyncResult:
        """Decode and install a complete snapshot in a worker thread, then commit it on the loop.
        Runs to the end even if the stream goes meanwhile (the index already holds the filter)."""
        loop = asyncio.get_running_loop()

        async def run() -> SyncResult:
            await loop.run_in_executor(self.shell.executor, self.shell.run_install, job)
            return await self.shell.call(self.shell.finish_install, job, self.clock())

        task = asyncio.ensure_future(run())
        self._installing[node_id] = task
        self._keep(task)

        def done(_task: asyncio.Future[SyncResult]) -> None:
            if self._installing.get(node_id) is task:
                del self._installing[node_id]
        task.add_done_callback(done)
        return await asyncio.shield(task)

    def _refusal(self, node_id: str, who: PeerIdentity) -> str | None:
        """Why `who` may not open node_id's stream (None: allowed). Called under the shell's lock."""
        reason = self.authorizer.refusal(node_id, who)
        if reason is None and node_id in self._current and \
                self._identity.get(node_id) != self.authorizer.identity_key(who):
            reason = (f"node {node_id!r} is connected with another identity; a second stream must carry the "
                      "same identity (reconnect takeover)")
        return reason

    async def _hello(self, stream: _Stream, msg: sync_pb2.NodeMessage) -> list[sync_pb2.CoordinatorMessage]:
        if msg.WhichOneof("body") != "hello":
            raise StreamRefused(grpc.StatusCode.FAILED_PRECONDITION,
                                "the first message of a sync stream must be a Hello")
        node_id = msg.hello.node_id
        await self.settled(node_id)      # an install of this node in flight commits first
        now = self.clock()

        def open_stream() -> tuple[str | None, SyncResult | None, _Stream | None]:
            with self.shell.lock:
                refusal = self._refusal(node_id, stream.who)
                if refusal is not None:
                    return refusal, None, None
                result = self.shell.open(stream.stream_id, msg.hello, now)     # SyncError: refused
                previous = self._current.get(node_id)
                stream.node_id = node_id
                self._current[node_id] = stream
                self._identity[node_id] = self.authorizer.identity_key(stream.who)
                return None, result, previous

        refusal, result, previous = await self.shell.call(open_stream)
        if refusal is not None:
            log.warning("sync stream refused: identity", extra={"node_id": node_id, "peer": stream.who.describe(),
                                                                 "reason": refusal})
            raise StreamRefused(grpc.StatusCode.PERMISSION_DENIED, refusal)
        assert result is not None
        if stream.hello_timer is not None:
            stream.hello_timer.cancel()
        self.admission.hello_done()
        opened = next((e for e in result.events if isinstance(e, StreamOpened)), None)
        if opened is not None and opened.took_over and previous is not None and previous is not stream:
            log.warning("sync stream taken over: a new stream for this node id replaces the open one", extra={
                "node_id": node_id, "old_peer": previous.peer, "new_peer": stream.peer})
            previous.outbox.end(StreamEnd(grpc.StatusCode.ABORTED,
                                          f"the sync stream of node {node_id!r} was taken over by a new stream "
                                          f"from {stream.peer}; this one is closed"), now=True)
        log.info("sync stream opened", extra={"node_id": node_id, "stream": stream.stream_id, "peer": stream.peer,
                                               "address": msg.hello.storage_address,
                                               "epoch": msg.hello.epoch, "sequence": msg.hello.sequence})
        return list(result.replies)

    def _closed(self, stream: _Stream) -> None:
        """The stream ended (once): the protocol object hears of it after any install in flight."""
        node_id = stream.node_id
        if node_id is None:
            return
        install = self._installing.get(node_id)
        if install is not None:
            install.add_done_callback(lambda _t: self._keep(asyncio.ensure_future(self._close(stream, node_id))))
        else:
            self._keep(asyncio.ensure_future(self._close(stream, node_id)))

    async def _close(self, stream: _Stream, node_id: str) -> None:
        def close() -> None:
            with self.shell.lock:
                self.shell.close(node_id, stream.stream_id, self.clock())
                if self._current.get(node_id) is stream:
                    del self._current[node_id]
                    self._identity.pop(node_id, None)
        await self.shell.call(close)
        log.info("sync stream closed", extra={"node_id": node_id, "stream": stream.stream_id})

    def _keep(self, task: asyncio.Future[Any]) -> None:
        """Hold a reference to a task until it is done (the loop keeps only weak ones)."""
        self._tasks.add(task)
        task.add_done_callback(self._tasks.discard)
