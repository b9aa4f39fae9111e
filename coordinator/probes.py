"""Concurrent probes to node storage: grpc.aio calls on cached channels, with deadlines.

A probe is one NodeStorage call to one candidate. `ask_all` sends the same call to every
candidate at once, on the event loop (no thread per probe), and hands back the results as they
complete, so a read can stop at the first hit while the others are still awaited for
accounting (`on_all_done`).
"""

from __future__ import annotations

import asyncio
import time
from dataclasses import dataclass
from typing import Any, Awaitable, Callable, Iterator, Sequence

import grpc

from shardsieve.security import make_aio_channel
from shardsieve.v1 import storage_pb2_grpc

UNREACHABLE_CODES = (grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.DEADLINE_EXCEEDED,
                     grpc.StatusCode.CANCELLED, grpc.StatusCode.UNKNOWN, grpc.StatusCode.INTERNAL,
                     grpc.StatusCode.RESOURCE_EXHAUSTED)

# an unreachable node's dropped channel is closed this long after (calls still on it end by their deadline)
_DROPPED_CHANNEL_GRACE_S = 30.0


@dataclass
class ProbeResult:
    node_id: str
    reply: Any = None
    error: grpc.RpcError | None = None
    seconds: float | None = None      # how long the call took (None: not sent)

    @property
    def reached(self) -> bool:
        return self.error is None

    @property
    def code(self) -> grpc.StatusCode | None:
        return self.error.code() if self.error is not None else None

    def describe_error(self) -> str:
        if self.error is None:
            return ""
        return f"{self.node_id}: {self.error.code().name} {self.error.details() or ''}".strip()


class Prober:
    """NodeStorage calls to nodes from the coordinator's event loop (create and use it there)."""

    def __init__(self, *, credentials: grpc.ChannelCredentials | None = None,
                 metadata: tuple[tuple[str, str], ...] = ()) -> None:
        # TLS towards the nodes and their storage token (shardsieve/security.py); None/(): plaintext, no token
        self._credentials = credentials
        self._metadata = metadata
        self._stubs: dict[str, tuple[grpc.aio.Channel, storage_pb2_grpc.NodeStorageStub]] = {}
        self._closing: set[asyncio.Future[Any]] = set()

    def set_metadata(self, metadata: tuple[tuple[str, str], ...]) -> None:
        """Metadata (the nodes' storage token) for every probe from now on."""
        self._metadata = metadata

    def stub(self, address: str) -> storage_pb2_grpc.NodeStorageStub:
        entry = self._stubs.get(address)
        if entry is None:
            # Short reconnect backoff and DNS re-resolution: gRPC's defaults (backoff growing to
            # minutes, 30 s between DNS lookups) would keep a restarted node, possibly at a new
            # address (a replaced container), reported unreachable long after it serves again.
            channel = make_aio_channel(address, self._credentials, options=[
                ("grpc.enable_retries", 0),
                ("grpc.initial_reconnect_backoff_ms", 100),
                ("grpc.min_reconnect_backoff_ms", 100),
                ("grpc.max_reconnect_backoff_ms", 1000),
                ("grpc.dns_min_time_between_resolutions_ms", 500),
                # Own subchannels: a fresh channel must not inherit a failed connection state
                # from a dropped one to the same address (gRPC shares them process-wide).
                ("grpc.use_local_subchannel_pool", 1),
            ])
            entry = self._stubs[address] = (channel, storage_pb2_grpc.NodeStorageStub(channel))
        return entry[1]

    async def call(self, node_id: str, address: str, method: str, request: Any, timeout: float) -> ProbeResult:
        if not address:
            return ProbeResult(node_id, error=_NoAddress(node_id))
        stub = self.stub(address)
        started = time.perf_counter()
        try:
            reply = await getattr(stub, method)(request, timeout=timeout, metadata=self._metadata)
            return ProbeResult(node_id, reply=reply, seconds=time.perf_counter() - started)
        except grpc.RpcError as exc:
            if exc.code() == grpc.StatusCode.UNAVAILABLE:
                self._drop_channel(address, stub)
            return ProbeResult(node_id, error=exc, seconds=time.perf_counter() - started)

    def _drop_channel(self, address: str, stub: storage_pb2_grpc.NodeStorageStub) -> None:
        """Drop an unreachable node's cached channel, so the next probe resolves its name afresh
        (a restarted node may come back at another IP; a cached channel would keep the old one).
        Closed after a grace: other calls may still use it."""
        entry = self._stubs.get(address)
        if entry is not None and entry[1] is stub:
            del self._stubs[address]
            closing = asyncio.ensure_future(entry[0].close(grace=_DROPPED_CHANNEL_GRACE_S))
            self._closing.add(closing)
            closing.add_done_callback(self._closing.discard)

    def ask_all(self, targets: Sequence[tuple[str, str]], method: str, request: Any, timeout: float,
                on_all_done: Callable[[list[ProbeResult]], None] | None = None) -> Iterator[Awaitable[ProbeResult]]:
        """Send request to every (node_id, address) at once; the results, awaited in the order
        they complete.

        on_all_done runs once every call finished, even if the caller stops early (so counters
        can account probes that completed after the first hit).
        """
        if not targets:
            if on_all_done is not None:
                on_all_done([])
            return iter(())
        calls = [asyncio.ensure_future(self.call(nid, addr, method, request, timeout)) for nid, addr in targets]
        if on_all_done is not None:
            everything = asyncio.gather(*calls)     # never fails: call() returns its error as a result
            everything.add_done_callback(lambda done: None if done.cancelled() else on_all_done(done.result()))
        return asyncio.as_completed(calls)

    async def close(self) -> None:
        stubs, self._stubs = self._stubs, {}
        for channel, _ in stubs.values():
            await channel.close()
        for closing in list(self._closing):
            closing.cancel()


class _NoAddress(grpc.RpcError):
    """A node known by id whose storage address was never learned."""

    def __init__(self, node_id: str) -> None:
        super().__init__(f"node {node_id} has no known storage address")
        self.node_id = node_id

    def code(self) -> grpc.StatusCode:
        return grpc.StatusCode.UNAVAILABLE

    def details(self) -> str:
        return f"no storage address known for node {self.node_id}"
