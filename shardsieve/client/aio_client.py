"""`AsyncClient`: the asyncio client, the same API as `Client` with coroutines.

Create, use and close it on one event loop (grpc.aio channels belong to the loop that made
them). Failover, retries, errors and results are shared with the synchronous client
(shardsieve/client/policy.py, errors.py, results.py, wire.py); local routing runs its feed
as a task on the same loop. docs/client.md is the guide.
"""

from __future__ import annotations

import asyncio
import contextlib
import time
from typing import Any, Awaitable, Callable, Iterable, Sequence

import grpc

from shardsieve.client import wire
from shardsieve.client.errors import CoordinatorUnavailable, ShardsieveError, Unavailable, from_rpc_error
from shardsieve.client.policy import READ, WRITE, CoordinatorPool, NotSent, RetryPolicy, pause_before_retry
from shardsieve.client.replica import LocalReplica
from shardsieve.client.results import Candidate, DeleteResult, ReadResult, WriteResult
from shardsieve.security import auth_metadata, make_aio_channel
from shardsieve.v1 import routing_pb2, storage_pb2, storage_pb2_grpc

Metadata = tuple[tuple[str, str], ...]


class _Conn:
    def __init__(self, address: str, credentials: grpc.ChannelCredentials | None) -> None:
        self.address = address
        self.channel = make_aio_channel(address, credentials, options=wire.CHANNEL_OPTIONS)
        self._methods: dict[str, Any] = {}

    @property
    def ready(self) -> bool:
        return self.channel.get_state(try_to_connect=True) == grpc.ChannelConnectivity.READY

    async def wait_ready(self, timeout_s: float) -> bool:
        try:
            await asyncio.wait_for(self.channel.channel_ready(), timeout_s)
        except asyncio.TimeoutError:
            return False
        return True

    def method(self, path: str, reply_cls: type) -> Any:
        fn = self._methods.get(path)
        if fn is None:
            fn = self._methods[path] = self.channel.unary_unary(
                path, request_serializer=lambda m: m.SerializeToString(), response_deserializer=reply_cls.FromString)
        return fn


class AsyncClient:
    """The asyncio client; arguments as for `Client`."""

    def __init__(self, coordinators: str | Sequence[str], *, token: str = "", node_token: str = "",
                 credentials: grpc.ChannelCredentials | None = None, timeout_s: float = 10.0,
                 connect_timeout_s: float = 2.0, retry: RetryPolicy | None = None, rest_s: float = 1.0,
                 max_rest_s: float = 30.0, local_routing: bool = False, mode: str | None = None,
                 clock: Callable[[], float] = time.monotonic,
                 sleep: Callable[[float], Awaitable[None]] = asyncio.sleep) -> None:
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
        self._conns: dict[str, _Conn] = {}
        self._nodes: dict[str, tuple[grpc.aio.Channel, storage_pb2_grpc.NodeStorageStub]] = {}
        self.replica: LocalReplica | None = LocalReplica(mode=mode) if local_routing else None
        self._feed: asyncio.Task[None] | None = None
        self.feed_address: str | None = None
        self._closed = False

    # -- lifecycle ------------------------------------------------------------------------------------
    async def __aenter__(self) -> AsyncClient:
        self.start()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.close()

    def start(self) -> None:
        """Start local routing's feed (done by `async with`; a no-op without local routing)."""
        if self.replica is not None and self._feed is None:
            self._feed = asyncio.get_running_loop().create_task(self._run_feed(), name="shardsieve-replica-feed")

    async def close(self) -> None:
        self._closed = True
        if self._feed is not None:
            self._feed.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._feed
        conns, self._conns = list(self._conns.values()), {}
        nodes, self._nodes = list(self._nodes.values()), {}
        for conn in conns:
            await conn.channel.close()
        for channel, _ in nodes:
            await channel.close()

    def _conn(self, address: str) -> _Conn:
        conn = self._conns.get(address)
        if conn is None:
            conn = self._conns[address] = _Conn(address, self.credentials)
        return conn

    # -- one call, with failover and retries --------------------------------------------------------------
    async def call(self, path: str, request: Any, reply_cls: type, kind: str,
                   timeout_s: float | None = None) -> tuple[Any, str]:
        deadline = self._clock() + (timeout_s if timeout_s is not None else self.timeout_s)
        retry = 0
        while True:
            try:
                return await self._once(path, request, reply_cls, kind, deadline)
            except (NotSent, ShardsieveError) as exc:
                retry += 1
                pause = pause_before_retry(self.retry, kind, exc, retry, self._clock(), deadline)
            await self._sleep(pause)

    async def _once(self, path: str, request: Any, reply_cls: type, kind: str, deadline: float) -> tuple[Any, str]:
        tried: list[str] = []
        for address in self.pool.order(self._clock()):
            remaining = deadline - self._clock()
            if remaining <= 0:
                break
            conn = self._conn(address)
            if not conn.ready and not await conn.wait_ready(min(self.connect_timeout_s, remaining)):
                self.pool.failed(address, self._clock())
                tried.append(address)
                continue
            try:
                reply = await conn.method(path, reply_cls)(request, timeout=deadline - self._clock(),
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

    async def _router(self, name: str, request: Any, timeout_s: float | None) -> tuple[Any, str]:
        _, reply_cls, kind = wire.ROUTER_METHODS[name]
        return await self.call(wire.ROUTER + name, request, reply_cls, kind, timeout_s)

    # -- reads ----------------------------------------------------------------------------------------
    async def get(self, key: bytes, *, timeout_s: float | None = None) -> ReadResult:
        key = wire.check_key(key)
        if self._local_ready():
            return await self._retrying(READ, lambda deadline: self._get_local(key, deadline), timeout_s)
        reply, address = await self._router("Read", routing_pb2.ReadRequest(key=key), timeout_s)
        return wire.read_result(key, reply, address)

    async def get_many(self, keys: Sequence[bytes], *, timeout_s: float | None = None) -> list[ReadResult]:
        keys = wire.check_keys(keys)
        if not keys:
            return []
        if self._local_ready():
            return await self._retrying(READ, lambda deadline: self._get_many_local(keys, deadline), timeout_s)
        reply, address = await self._router("ReadBatch", routing_pb2.ReadBatchRequest(keys=keys), timeout_s)
        return [wire.read_result(k, r, address) for k, r in zip(keys, reply.results)]

    async def locate(self, key: bytes, *, timeout_s: float | None = None) -> list[Candidate]:
        key = wire.check_key(key)
        if self._local_ready():
            assert self.replica is not None
            return self.replica.candidates([key], self._clock())[0]
        reply, _ = await self._router("Locate", routing_pb2.LocateRequest(key=key), timeout_s)
        return wire.candidates_of(reply)

    async def locate_many(self, keys: Sequence[bytes], *, timeout_s: float | None = None) -> list[list[Candidate]]:
        keys = wire.check_keys(keys)
        if self._local_ready():
            assert self.replica is not None
            return self.replica.candidates(keys, self._clock())
        reply, _ = await self._router("LocateBatch", routing_pb2.LocateBatchRequest(keys=keys), timeout_s)
        return [wire.candidates_of(r) for r in reply.results]

    # -- writes ---------------------------------------------------------------------------------------
    async def put(self, key: bytes, value: bytes, *, node_id: str = "", move: bool = False,
                  timeout_s: float | None = None) -> WriteResult:
        (item,) = wire.write_items([(key, value, node_id, move)])
        reply, _ = await self._router("Write", item, timeout_s)
        result = wire.write_result(item.key, reply)
        self._hold([result])
        return result

    async def put_many(self, items: Iterable[Any], *, timeout_s: float | None = None) -> list[WriteResult]:
        requests = wire.write_items(list(items))
        if not requests:
            return []
        reply, address = await self._router("WriteBatch", routing_pb2.WriteBatchRequest(items=requests), timeout_s)
        results = wire.write_results(requests, reply, address)
        self._hold(results)
        return results

    async def delete(self, key: bytes, *, timeout_s: float | None = None) -> DeleteResult:
        key = wire.check_key(key)
        reply, _ = await self._router("Remove", routing_pb2.RemoveRequest(key=key), timeout_s)
        return DeleteResult(key, tuple(reply.node_ids))

    async def delete_many(self, keys: Sequence[bytes], *, timeout_s: float | None = None) -> list[DeleteResult]:
        keys = wire.check_keys(keys)
        if not keys:
            return []
        reply, address = await self._router("RemoveBatch", routing_pb2.RemoveBatchRequest(keys=keys), timeout_s)
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

    async def wait_local_ready(self, timeout_s: float = 10.0) -> None:
        if self.replica is None:
            raise ValueError("this client was made without local_routing")
        self.start()
        deadline = self._clock() + timeout_s
        while not self.replica.ready():
            if self._clock() >= deadline:
                raise CoordinatorUnavailable(f"no replica feed within {timeout_s:.1f}s from "
                                             f"{', '.join(self.pool.addresses)}", tried=self.pool.addresses)
            await asyncio.sleep(0.02)

    async def _retrying(self, kind: str, attempt: Callable[[float], Awaitable[Any]], timeout_s: float | None) -> Any:
        deadline = self._clock() + (timeout_s if timeout_s is not None else self.timeout_s)
        retry = 0
        while True:
            try:
                return await attempt(deadline)
            except Unavailable as error:
                retry += 1
                pause = pause_before_retry(self.retry, kind, error, retry, self._clock(), deadline)
                await self._sleep(pause)

    def _node(self, address: str) -> storage_pb2_grpc.NodeStorageStub:
        entry = self._nodes.get(address)
        if entry is None:
            channel = make_aio_channel(address, self.credentials, options=wire.CHANNEL_OPTIONS)
            entry = self._nodes[address] = (channel, storage_pb2_grpc.NodeStorageStub(channel))
        return entry[1]

    async def _probe(self, node_id: str, address: str, call: Awaitable[Any]) -> Any:
        try:
            return await call
        except grpc.RpcError as exc:
            return wire.ProbeFailure(node_id, address, exc)

    async def _get_local(self, key: bytes, deadline: float) -> ReadResult:
        assert self.replica is not None
        cands = self.replica.candidates([key], self._clock())[0]
        request = storage_pb2.GetRequest(key=key)
        timeout = max(deadline - self._clock(), 0.001)
        answers = await asyncio.gather(*(self._probe(c.node_id, c.address, self._node(c.address).Get(
            request, timeout=timeout, metadata=self.node_metadata)) for c in cands))
        return wire.local_read(key, cands, answers)

    async def _get_many_local(self, keys: list[bytes], deadline: float) -> list[ReadResult]:
        assert self.replica is not None
        rows = self.replica.candidates(keys, self._clock())
        timeout = max(deadline - self._clock(), 0.001)
        parts = []
        for node_id, (address, idx) in wire.group_by_node(rows).items():
            for lo in range(0, len(idx), wire.NODE_BATCH):
                parts.append((node_id, address, idx[lo:lo + wire.NODE_BATCH]))
        replies = await asyncio.gather(*(self._probe(n, a, self._node(a).BatchGet(
            storage_pb2.BatchGetRequest(keys=[keys[i] for i in part]), timeout=timeout,
            metadata=self.node_metadata)) for n, a, part in parts))
        answers: dict[str, dict[int, Any]] = {}
        for (node_id, address, part), reply in zip(parts, replies):
            got = answers.setdefault(node_id, {})
            for j, i in enumerate(part):
                got[i] = reply if isinstance(reply, wire.ProbeFailure) else reply.items[j]
        return wire.local_reads(keys, rows, answers)

    async def _run_feed(self) -> None:
        assert self.replica is not None
        retry = 0
        while not self._closed:
            for address in self.pool.order(self._clock()):
                conn = self._conn(address)
                if not conn.ready and not await conn.wait_ready(self.connect_timeout_s):
                    self.pool.failed(address, self._clock())
                    continue
                watch = conn.channel.unary_stream(
                    wire.ROUTER + "WatchReplicas", request_serializer=lambda m: m.SerializeToString(),
                    response_deserializer=routing_pb2.ReplicaFeed.FromString)
                call = watch(routing_pb2.WatchReplicasRequest(), metadata=self.metadata)
                self.replica.resubscribed()
                self.feed_address = address
                try:
                    async for message in call:
                        self.replica.apply(message, self._clock())
                        retry = 0
                        if self.replica.needs_resync:
                            call.cancel()
                            break
                except grpc.RpcError:
                    self.pool.failed(address, self._clock())
                break
            retry += 1
            await asyncio.sleep(self.retry.backoff_s(min(retry, 8)) + 0.01)
