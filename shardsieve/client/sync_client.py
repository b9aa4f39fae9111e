"""`Client`: the synchronous client (thread-safe; share one per process).

Calls go to a coordinator's Router, with failover between coordinators and retries by
shardsieve/client/policy.py; with `local_routing=True` reads and locates are answered in this
process from a replica fed by WatchReplicas (shardsieve/client/replica.py) and the nodes are
probed directly: one hop. Writes and deletes always go through a coordinator (placement,
second-copy checks, its read-your-writes hints); with local routing their acknowledgement
positions also become hints here. docs/client.md is the guide.
"""

from __future__ import annotations

import threading
import time
from typing import Any, Callable, Iterable, Sequence

import grpc

from shardsieve.client import wire
from shardsieve.client.errors import CoordinatorUnavailable, ShardsieveError, Unavailable, from_rpc_error
from shardsieve.client.policy import READ, WRITE, CoordinatorPool, NotSent, RetryPolicy, pause_before_retry
from shardsieve.client.replica import LocalReplica
from shardsieve.client.results import Candidate, DeleteResult, ReadResult, WriteResult
from shardsieve.security import auth_metadata, make_channel
from shardsieve.v1 import routing_pb2, storage_pb2

Metadata = tuple[tuple[str, str], ...]


class _Conn:
    """One coordinator's channel, whether it is connected, and its methods."""

    def __init__(self, address: str, credentials: grpc.ChannelCredentials | None) -> None:
        self.address = address
        self.channel = make_channel(address, credentials, options=wire.CHANNEL_OPTIONS)
        self.ready = False
        self.channel.subscribe(self._on_state, try_to_connect=False)
        self._methods: dict[str, Callable[..., Any]] = {}

    def _on_state(self, state: grpc.ChannelConnectivity) -> None:
        self.ready = state == grpc.ChannelConnectivity.READY

    def wait_ready(self, timeout_s: float) -> bool:
        try:
            grpc.channel_ready_future(self.channel).result(timeout=timeout_s)
        except grpc.FutureTimeoutError:
            return False
        self.ready = True
        return True

    def method(self, path: str, reply_cls: type) -> Callable[..., Any]:
        fn = self._methods.get(path)
        if fn is None:
            fn = self._methods[path] = self.channel.unary_unary(
                path, request_serializer=lambda m: m.SerializeToString(), response_deserializer=reply_cls.FromString)
        return fn

    def close(self) -> None:
        self.channel.unsubscribe(self._on_state)
        self.channel.close()


class Client:
    """A shardsieve client. `coordinators`: one HOST:PORT or several, most preferred first."""

    def __init__(self, coordinators: str | Sequence[str], *, token: str = "", node_token: str = "",
                 credentials: grpc.ChannelCredentials | None = None, timeout_s: float = 10.0,
                 connect_timeout_s: float = 2.0, retry: RetryPolicy | None = None, rest_s: float = 1.0,
                 max_rest_s: float = 30.0, local_routing: bool = False, mode: str | None = None,
                 clock: Callable[[], float] = time.monotonic, sleep: Callable[[float], None] = time.sleep) -> None:
        """token: bearer token for the coordinator (read/write tokens: docs/security.md);
        node_token: the nodes' storage token, for local routing's direct probes; credentials:
        TLS channel credentials (None: plaintext); timeout_s: default deadline of a call, all its
        attempts included; connect_timeout_s: how long to wait for a coordinator to connect
        before moving on; mode: local routing's 'safe' / 'fast' override (None: the coordinator's)."""
        addresses = (coordinators,) if isinstance(coordinators, str) else tuple(coordinators)
        if not timeout_s > 0 or not connect_timeout_s > 0:
            raise ValueError("timeout_s and connect_timeout_s must be above 0")
        self.pool = CoordinatorPool(addresses, rest_s=rest_s, max_rest_s=max_rest_s)
        self.timeout_s = timeout_s
        self.connect_timeout_s = connect_timeout_s
        self.retry = retry or RetryPolicy()
        self.credentials = credentials
        self.metadata: Metadata = tuple(auth_metadata(token))
        self.node_metadata: Metadata = tuple(auth_metadata(node_token))
        self._clock = clock
        self._sleep = sleep
        self._lock = threading.Lock()
        self._conns: dict[str, _Conn] = {}
        self._nodes: dict[str, Any] = {}
        self._closed = threading.Event()
        self.replica: LocalReplica | None = None
        self._feed: threading.Thread | None = None
        self._feed_call: Any = None
        self.feed_address: str | None = None
        if local_routing:
            self.replica = LocalReplica(mode=mode)
            self._feed = threading.Thread(target=self._run_feed, name="shardsieve-replica-feed", daemon=True)
            self._feed.start()

    # -- lifecycle ------------------------------------------------------------------------------------
    def close(self) -> None:
        self._closed.set()
        call = self._feed_call
        if call is not None:
            call.cancel()
        if self._feed is not None:
            self._feed.join(timeout=5.0)
        with self._lock:
            conns, self._conns = list(self._conns.values()), {}
            nodes, self._nodes = list(self._nodes.values()), {}
        for conn in conns:
            conn.close()
        for channel, _ in nodes:
            channel.close()

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _conn(self, address: str) -> _Conn:
        with self._lock:
            conn = self._conns.get(address)
            if conn is None:
                conn = self._conns[address] = _Conn(address, self.credentials)
            return conn

    # -- one call, with failover and retries --------------------------------------------------------------
    def call(self, path: str, request: Any, reply_cls: type, kind: str, timeout_s: float | None = None) -> tuple[Any, str]:
        """Send one unary call (full method path) to a coordinator; returns (reply, the
        coordinator's address). Failover and retries as in shardsieve/client/policy.py."""
        deadline = self._clock() + (timeout_s if timeout_s is not None else self.timeout_s)
        retry = 0
        while True:
            try:
                return self._once(path, request, reply_cls, kind, deadline)
            except (NotSent, ShardsieveError) as exc:
                retry += 1
                pause = pause_before_retry(self.retry, kind, exc, retry, self._clock(), deadline)
            self._sleep(pause)

    def _once(self, path: str, request: Any, reply_cls: type, kind: str, deadline: float) -> tuple[Any, str]:
        tried: list[str] = []
        for address in self.pool.order(self._clock()):
            remaining = deadline - self._clock()
            if remaining <= 0:
                break
            conn = self._conn(address)
            if not conn.ready and not conn.wait_ready(min(self.connect_timeout_s, remaining)):
                self.pool.failed(address, self._clock())
                tried.append(address)
                continue
            try:
                reply = conn.method(path, reply_cls)(request, timeout=deadline - self._clock(),
                                                     metadata=self.metadata)
            except grpc.RpcError as exc:
                error = from_rpc_error(exc, address, write=kind == WRITE)
                if isinstance(error, CoordinatorUnavailable):
                    self.pool.failed(address, self._clock())
                    error.tried = (*tried, address)
                raise error from None
            self.pool.succeeded(address)
            return reply, address
        raise NotSent(tuple(tried))

    def _router(self, name: str, request: Any, timeout_s: float | None) -> tuple[Any, str]:
        _, reply_cls, kind = wire.ROUTER_METHODS[name]
        return self.call(wire.ROUTER + name, request, reply_cls, kind, timeout_s)

    # -- reads ----------------------------------------------------------------------------------------
    def get(self, key: bytes, *, timeout_s: float | None = None) -> ReadResult:
        """Read one key. `found` False: proven absent. Raises CandidateUnavailable when a node
        that may hold it could not be asked, CoordinatorUnavailable, AuthFailed, InvalidInput."""
        key = wire.check_key(key)
        if self._local_ready():
            return self._retrying(READ, lambda deadline: self._get_local(key, deadline), timeout_s)
        reply, address = self._router("Read", routing_pb2.ReadRequest(key=key), timeout_s)
        return wire.read_result(key, reply, address)

    def get_many(self, keys: Sequence[bytes], *, timeout_s: float | None = None) -> list[ReadResult]:
        """Read many keys in one call (ReadBatch: one node batch call per node); per-key results
        in order, a key that could not be read carrying `error` (CandidateUnavailable, ...)."""
        keys = wire.check_keys(keys)
        if not keys:
            return []
        if self._local_ready():
            return self._retrying(READ, lambda deadline: self._get_many_local(keys, deadline), timeout_s)
        reply, address = self._router("ReadBatch", routing_pb2.ReadBatchRequest(keys=keys), timeout_s)
        return [wire.read_result(k, r, address) for k, r in zip(keys, reply.results)]

    def locate(self, key: bytes, *, timeout_s: float | None = None) -> list[Candidate]:
        """The candidate nodes of a key (no node is asked)."""
        key = wire.check_key(key)
        if self._local_ready():
            assert self.replica is not None
            return self.replica.candidates([key], self._clock())[0]
        reply, _ = self._router("Locate", routing_pb2.LocateRequest(key=key), timeout_s)
        return wire.candidates_of(reply)

    def locate_many(self, keys: Sequence[bytes], *, timeout_s: float | None = None) -> list[list[Candidate]]:
        keys = wire.check_keys(keys)
        if self._local_ready():
            assert self.replica is not None
            return self.replica.candidates(keys, self._clock())
        reply, _ = self._router("LocateBatch", routing_pb2.LocateBatchRequest(keys=keys), timeout_s)
        return [wire.candidates_of(r) for r in reply.results]

    # -- writes ---------------------------------------------------------------------------------------
    def put(self, key: bytes, value: bytes, *, node_id: str = "", move: bool = False,
            timeout_s: float | None = None) -> WriteResult:
        """Write key where it lives, else where the coordinator places it; or on `node_id` (a key
        held elsewhere is refused with SecondCopy unless `move`). Routable at once."""
        (item,) = wire.write_items([(key, value, node_id, move)])
        reply, _ = self._router("Write", item, timeout_s)
        result = wire.write_result(item.key, reply)
        self._hold([result])
        return result

    def put_many(self, items: Iterable[Any], *, timeout_s: float | None = None) -> list[WriteResult]:
        """Write many keys in one call (WriteBatch). Items: (key, value) or (key, value, node_id[, move])."""
        requests = wire.write_items(list(items))
        if not requests:
            return []
        reply, address = self._router("WriteBatch", routing_pb2.WriteBatchRequest(items=requests), timeout_s)
        results = wire.write_results(requests, reply, address)
        self._hold(results)
        return results

    def delete(self, key: bytes, *, timeout_s: float | None = None) -> DeleteResult:
        key = wire.check_key(key)
        reply, _ = self._router("Remove", routing_pb2.RemoveRequest(key=key), timeout_s)
        return DeleteResult(key, tuple(reply.node_ids))

    def delete_many(self, keys: Sequence[bytes], *, timeout_s: float | None = None) -> list[DeleteResult]:
        keys = wire.check_keys(keys)
        if not keys:
            return []
        reply, address = self._router("RemoveBatch", routing_pb2.RemoveBatchRequest(keys=keys), timeout_s)
        return wire.delete_results(keys, reply, address)

    def _hold(self, results: Sequence[WriteResult]) -> None:
        if self.replica is None:
            return
        now = self._clock()
        for r in results:
            if r.ok:
                self.replica.hold(r.key, r.node_id, r.epoch, r.sequence, now)

    # -- local routing ---------------------------------------------------------------------------------
    def _local_ready(self) -> bool:
        return self.replica is not None and self.replica.ready()

    def wait_local_ready(self, timeout_s: float = 10.0) -> None:
        """Block until local routing holds a first full replica (CoordinatorUnavailable if not in time)."""
        if self.replica is None:
            raise ValueError("this client was made without local_routing")
        deadline = self._clock() + timeout_s
        while not self.replica.ready():
            if self._clock() >= deadline:
                raise CoordinatorUnavailable(f"no replica feed within {timeout_s:.1f}s from "
                                             f"{', '.join(self.pool.addresses)}", tried=self.pool.addresses)
            self._closed.wait(0.02)

    def _retrying(self, kind: str, attempt: Callable[[float], Any], timeout_s: float | None) -> Any:
        deadline = self._clock() + (timeout_s if timeout_s is not None else self.timeout_s)
        retry = 0
        while True:
            try:
                return attempt(deadline)
            except Unavailable as error:
                retry += 1
                pause = pause_before_retry(self.retry, kind, error, retry, self._clock(), deadline)
                self._sleep(pause)

    def _node(self, address: str) -> Any:
        with self._lock:
            entry = self._nodes.get(address)
            if entry is None:
                channel = make_channel(address, self.credentials, options=wire.CHANNEL_OPTIONS)
                from shardsieve.v1 import storage_pb2_grpc
                entry = self._nodes[address] = (channel, storage_pb2_grpc.NodeStorageStub(channel))
            return entry[1]

    def _get_local(self, key: bytes, deadline: float) -> ReadResult:
        assert self.replica is not None
        cands = self.replica.candidates([key], self._clock())[0]
        request = storage_pb2.GetRequest(key=key)
        timeout = max(deadline - self._clock(), 0.001)
        if len(cands) == 1:
            c = cands[0]
            try:
                answer: Any = self._node(c.address).Get(request, timeout=timeout, metadata=self.node_metadata)
            except grpc.RpcError as exc:
                answer = wire.ProbeFailure(c.node_id, c.address, exc)
            return wire.local_read(key, cands, [answer])
        futures = [self._node(c.address).Get.future(request, timeout=timeout, metadata=self.node_metadata)
                   for c in cands]
        answers = []
        for c, f in zip(cands, futures):
            try:
                answers.append(f.result())
            except grpc.RpcError as exc:
                answers.append(wire.ProbeFailure(c.node_id, c.address, exc))
        return wire.local_read(key, cands, answers)

    def _get_many_local(self, keys: list[bytes], deadline: float) -> list[ReadResult]:
        assert self.replica is not None
        rows = self.replica.candidates(keys, self._clock())
        timeout = max(deadline - self._clock(), 0.001)
        calls = []
        for node_id, (address, idx) in wire.group_by_node(rows).items():
            for lo in range(0, len(idx), wire.NODE_BATCH):
                part = idx[lo:lo + wire.NODE_BATCH]
                future = self._node(address).BatchGet.future(storage_pb2.BatchGetRequest(
                    keys=[keys[i] for i in part]), timeout=timeout, metadata=self.node_metadata)
                calls.append((node_id, address, part, future))
        answers: dict[str, dict[int, Any]] = {}
        for node_id, address, part, future in calls:
            got = answers.setdefault(node_id, {})
            try:
                items = future.result().items
                for j, i in enumerate(part):
                    got[i] = items[j]
            except (grpc.RpcError, IndexError) as exc:
                failure = wire.ProbeFailure(node_id, address, exc if isinstance(exc, grpc.RpcError)
                                            else grpc.RpcError())
                for i in part:
                    got[i] = failure
        return wire.local_reads(keys, rows, answers)

    def _run_feed(self) -> None:
        """The replica feed: subscribe to a coordinator (failover as for calls), apply what
        arrives, subscribe afresh on a problem or a broken stream."""
        assert self.replica is not None
        retry = 0
        while not self._closed.is_set():
            for address in self.pool.order(self._clock()):
                if self._closed.is_set():
                    return
                conn = self._conn(address)
                if not conn.ready and not conn.wait_ready(self.connect_timeout_s):
                    self.pool.failed(address, self._clock())
                    continue
                watch = conn.channel.unary_stream(
                    wire.ROUTER + "WatchReplicas", request_serializer=lambda m: m.SerializeToString(),
                    response_deserializer=routing_pb2.ReplicaFeed.FromString)
                call = self._feed_call = watch(routing_pb2.WatchReplicasRequest(), metadata=self.metadata)
                self.replica.resubscribed()
                self.feed_address = address
                try:
                    for message in call:
                        self.replica.apply(message, self._clock())
                        retry = 0
                        if self.replica.needs_resync:
                            call.cancel()
                            break
                except grpc.RpcError:
                    if self._closed.is_set():
                        return
                    self.pool.failed(address, self._clock())
                finally:
                    self._feed_call = None
                break
            retry += 1
            self._closed.wait(self.retry.backoff_s(min(retry, 8)) + 0.01)
