"""An in-process test coordinator that speaks the real FilterSync gRPC API.

It runs the real coordinator protocol object (`CoordinatorSync`) behind a small grpc.server
and keeps replicas in a `DictReplicaSink` (one BloomFilter per node id), so tests and
benchmarks can compare a node's filter with the coordinator's copy bit for bit, inject
coordinator messages (rebuild requests, deliberately wrong messages) into a node's stream,
and timestamp every node message as it arrives.

    with TestCoordinator() as coord:              # listens on 127.0.0.1:<free port>
        ... start a node with --coordinator coord.address ...
        coord.wait_for_node("n1", timeout=10)
        coord.replica("n1")                        # a copy of the BloomFilter, or None
        coord.send("n1", CoordinatorMessage(...))  # into the node's current stream
"""

from __future__ import annotations

import itertools
import queue
import threading
import time
from concurrent import futures
from typing import Callable

import grpc

from shardsieve.bloom import BloomFilter
from shardsieve.sync.coordinator_side import CoordinatorSync, DictReplicaSink, NodeState
from shardsieve.sync.errors import SyncError
from shardsieve.v1 import sync_pb2, sync_pb2_grpc

_END = object()


class _Servicer(sync_pb2_grpc.FilterSyncServicer):
    def __init__(self, owner: TestCoordinator) -> None:
        self.owner = owner

    def Stream(self, request_iterator, context):  # noqa: N802 - gRPC method name
        owner = self.owner
        stream_id = next(owner._stream_ids)
        outq: queue.Queue[object] = queue.Queue()
        try:
            first = next(request_iterator)
        except StopIteration:
            return
        arrived = time.monotonic()
        owner._record(first, arrived)
        if first.WhichOneof("body") != "hello":
            context.abort(grpc.StatusCode.INVALID_ARGUMENT, "the first message on a stream must be a Hello")
        node_id = first.hello.node_id
        try:
            with owner.lock:
                replies = owner.sync.open(stream_id, first.hello, arrived).replies
        except SyncError as exc:
            context.abort(getattr(grpc.StatusCode, exc.grpc_status_name), str(exc))
        with owner.lock:
            owner._queues[node_id] = outq
        for reply in replies:
            outq.put(reply)
        error: list[SyncError] = []

        def read() -> None:
            try:
                for msg in request_iterator:
                    now = time.monotonic()
                    owner._record(msg, now)
                    if owner.drop_messages:
                        continue
                    try:
                        with owner.lock:
                            out = owner.sync.receive(node_id, stream_id, msg, now).replies
                    except SyncError as exc:
                        error.append(exc)
                        return
                    for reply in out:
                        outq.put(reply)
            except grpc.RpcError:
                pass
            finally:
                outq.put(_END)

        reader = threading.Thread(target=read, daemon=True, name=f"test-coord-read-{stream_id}")
        reader.start()
        try:
            while context.is_active():
                try:
                    item = outq.get(timeout=0.2)
                except queue.Empty:
                    continue
                if item is _END:
                    break
                yield item
            if error:
                context.abort(getattr(grpc.StatusCode, error[0].grpc_status_name), str(error[0]))
        finally:
            with owner.lock:
                owner.sync.close(node_id, stream_id, time.monotonic())
                if owner._queues.get(node_id) is outq:
                    del owner._queues[node_id]


class TestCoordinator:
    """FilterSync server on loopback with the real CoordinatorSync and a dict-of-BloomFilter sink."""

    __test__ = False  # not a pytest test class

    def __init__(self, host: str = "127.0.0.1", port: int = 0) -> None:
        self.sink = DictReplicaSink()
        self.sync = CoordinatorSync(self.sink)
        self.lock = threading.RLock()
        self.arrivals: list[tuple[float, sync_pb2.NodeMessage]] = []
        self.on_message: Callable[[sync_pb2.NodeMessage, float], None] | None = None
        self.keep_arrivals = False
        self.drop_messages = False
        self._queues: dict[str, queue.Queue[object]] = {}
        self._stream_ids = itertools.count(1)
        self.server = grpc.server(futures.ThreadPoolExecutor(max_workers=16, thread_name_prefix="test-coord"),
                                  options=[("grpc.max_receive_message_length", 64 << 20)])
        sync_pb2_grpc.add_FilterSyncServicer_to_server(_Servicer(self), self.server)
        self.port = self.server.add_insecure_port(f"{host}:{port}")
        self.address = f"{host}:{self.port}"

    def start(self) -> TestCoordinator:
        self.server.start()
        return self

    def stop(self) -> None:
        self.server.stop(0.5).wait(2)

    def __enter__(self) -> TestCoordinator:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def _record(self, msg: sync_pb2.NodeMessage, now: float) -> None:
        if self.on_message is not None:
            self.on_message(msg, now)
        if self.keep_arrivals:
            with self.lock:
                self.arrivals.append((now, msg))

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
            return self.sync.is_connected(node_id) and node_id in self._queues

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
            self._queues[node_id].put(msg)

    def request_rebuild(self, node_id: str, capacity: int, target_fpr: float, reason: str = "test") -> None:
        with self.lock:
            result = self.sync.request_rebuild(node_id, capacity, target_fpr, reason, time.monotonic())
            for msg in result.replies:
                self._queues[node_id].put(msg)
