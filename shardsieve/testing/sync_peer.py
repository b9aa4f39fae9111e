"""An in-process test coordinator that speaks the real FilterSync gRPC API.

It runs the real coordinator protocol object (`CoordinatorSync`) behind a grpc.aio server on
an event loop of its own thread, each stream in the shared pump (shardsieve/stream_pump.py),
and keeps replicas in a `DictReplicaSink` (one BloomFilter per node id), so tests and
benchmarks can compare a node's filter with the coordinator's copy bit for bit, inject
coordinator messages (rebuild requests, deliberately wrong messages) into a node's stream,
and timestamp every node message as it arrives. Its methods are plain calls, usable from any
thread.

    with TestCoordinator() as coord:              # listens on 127.0.0.1:<free port>
        ... start a node with --coordinator coord.address ...
        coord.wait_for_node("n1", timeout=10)
        coord.replica("n1")                        # a copy of the BloomFilter, or None
        coord.send("n1", CoordinatorMessage(...))  # into the node's current stream
"""

from __future__ import annotations

import itertools
import threading
import time
from typing import Any, Callable

import grpc

from shardsieve.bloom import BloomFilter
from shardsieve.security import EXCLUSIVE_PORT_OPTION
from shardsieve.stream_pump import Outbox, StreamRefused, pump
from shardsieve.sync.coordinator_side import CoordinatorSync, DictReplicaSink, NodeState
from shardsieve.testing.event_loop import LoopThread
from shardsieve.v1 import sync_pb2, sync_pb2_grpc


class _Stream:
    """One node's stream at the test coordinator: its outbox, and its node once the Hello came."""

    def __init__(self, stream_id: int) -> None:
        self.stream_id = stream_id
        self.outbox: Outbox[sync_pb2.CoordinatorMessage] = Outbox(1 << 16)
        self.node_id: str | None = None


class _Servicer(sync_pb2_grpc.FilterSyncServicer):
    def __init__(self, owner: TestCoordinator) -> None:
        self.owner = owner

    async def Stream(self, request_iterator: Any, context: grpc.aio.ServicerContext) -> None:  # noqa: N802
        owner = self.owner
        stream = _Stream(next(owner._stream_ids))
        end = await pump(read=context.read, write=context.write, handle=lambda msg: owner._handle(stream, msg),
                         outbox=stream.outbox, on_close=lambda _end: owner._closed(stream),
                         name=f"test-coord-{stream.stream_id}")
        if not end.ok and end.code != grpc.StatusCode.CANCELLED:
            await context.abort(end.code, end.details)


class TestCoordinator:
    """FilterSync server on loopback with the real CoordinatorSync and a dict-of-BloomFilter sink."""

    __test__ = False  # not a pytest test class

    def __init__(self, host: str = "127.0.0.1", port: int = 0) -> None:
        self.sink = DictReplicaSink()
        self.sync = CoordinatorSync(self.sink)
        self.lock = threading.RLock()      # the protocol object is read from the caller's thread too
        self.arrivals: list[tuple[float, sync_pb2.NodeMessage]] = []
        self.on_message: Callable[[sync_pb2.NodeMessage, float], None] | None = None
        self.keep_arrivals = False
        self.drop_messages = False
        self._streams: dict[str, _Stream] = {}       # node id -> its current stream
        self._stream_ids = itertools.count(1)
        self._loop = LoopThread("test-coordinator")

        async def build() -> tuple[grpc.aio.Server, int]:
            server = grpc.aio.server(options=[("grpc.max_receive_message_length", 64 << 20), EXCLUSIVE_PORT_OPTION])
            sync_pb2_grpc.add_FilterSyncServicer_to_server(_Servicer(self), server)
            return server, server.add_insecure_port(f"{host}:{port}")

        self.server, self.port = self._loop.run(build())
        self.address = f"{host}:{self.port}"

    def start(self) -> TestCoordinator:
        self._loop.run(self.server.start())
        return self

    def stop(self) -> None:
        if self._loop.loop.is_closed():
            return
        self._loop.run(self.server.stop(0.5))
        self._loop.close()

    def __enter__(self) -> TestCoordinator:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    # ------------------------------------------------------------------ the streams (event loop)
    def _handle(self, stream: _Stream, msg: sync_pb2.NodeMessage) -> list[sync_pb2.CoordinatorMessage]:
        now = time.monotonic()
        if self.on_message is not None:
            self.on_message(msg, now)
        if self.keep_arrivals:
            with self.lock:
                self.arrivals.append((now, msg))
        with self.lock:
            if stream.node_id is None:
                if msg.WhichOneof("body") != "hello":
                    raise StreamRefused(grpc.StatusCode.INVALID_ARGUMENT,
                                        "the first message on a stream must be a Hello")
                replies = list(self.sync.open(stream.stream_id, msg.hello, now).replies)   # SyncError ends it
                stream.node_id = msg.hello.node_id
                self._streams[stream.node_id] = stream
                return replies
            if self.drop_messages:
                return []
            return list(self.sync.receive(stream.node_id, stream.stream_id, msg, now).replies)

    def _closed(self, stream: _Stream) -> None:
        if stream.node_id is None:
            return
        with self.lock:
            self.sync.close(stream.node_id, stream.stream_id, time.monotonic())
            if self._streams.get(stream.node_id) is stream:
                del self._streams[stream.node_id]

    # ------------------------------------------------------------------ inspection
    def replica(self, node_id: str) -> BloomFilter | None:
        """A copy of the coordinator's replica of node_id (None before the first snapshot)."""
        with self.lock:
            bloom = self.sink.replicas.get(node_id)
            return bloom.copy() if bloom is not None else None

    def view(self, node_id: str) -> NodeState | None:
        """A copy of node_id's state in the protocol object as it is now (None before its Hello)."""
        with self.lock:
            state = self.sync.node(node_id)
            return state.frozen_copy() if state is not None else None

    def connected(self, node_id: str) -> bool:
        with self.lock:
            return self.sync.is_connected(node_id) and node_id in self._streams

    def wait_for_node(self, node_id: str, timeout: float = 15.0) -> NodeState:
        """Wait until node_id is connected and has a replica."""
        from shardsieve.testing.procs import wait_until

        def ready() -> NodeState | None:
            v = self.view(node_id)
            return v if v is not None and v.connected and v.has_replica else None
        return wait_until(ready, timeout, message=f"node {node_id} connected with a replica")

    # ------------------------------------------------------------------ injection
    def send(self, node_id: str, msg: sync_pb2.CoordinatorMessage) -> None:
        """Put a message into node_id's current stream (KeyError when not connected)."""
        with self.lock:
            self._streams[node_id].outbox.send([msg])

    def request_rebuild(self, node_id: str, capacity: int, target_fpr: float, reason: str = "test") -> None:
        with self.lock:
            result = self.sync.request_rebuild(node_id, capacity, target_fpr, reason, time.monotonic())
            self._streams[node_id].outbox.send(result.replies)
