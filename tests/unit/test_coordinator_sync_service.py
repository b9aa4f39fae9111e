"""The coordinator's FilterSync servicer and Router on a real grpc.aio server on loopback, in
process (coordinator/sync_service.py, router_service.py).

Checked: a snapshot is installed in a worker thread, not on the event loop, and while one is
held there the loop still answers Locate (safe mode lists the node, as stale, until the commit;
then by its filter: docs/coordinator.md, "Freshness contract" (c) and (a)); a Hello-less stream
past max-pending-streams is refused RESOURCE_EXHAUSTED naming the setting and the held ones are
closed DEADLINE_EXCEEDED after the Hello deadline (docs/coordinator.md, "Sync streams"). The
reference for "the node holds the key" is the Bloom filter the simulated node built from its
own keys (Bloom 1970: a Bloom filter holds every inserted key).
"""

from __future__ import annotations

import asyncio
import threading
from concurrent.futures import ThreadPoolExecutor
from typing import Any, Iterator

import grpc
import pytest

from shardsieve.bloom import BloomFilter
from shardsieve.coordinator.policy import Policy
from shardsieve.coordinator.probes import Prober
from shardsieve.coordinator.router_service import Router, RouterService, add_router_service
from shardsieve.coordinator.sync_service import SyncService
from shardsieve.coordinator.wiring import CoordinatorState, wire_state
from shardsieve.geometry import Geometry
from shardsieve.hashing import positions
from shardsieve.security import StreamAdmission
from shardsieve.sync.coordinator_side import CoordinatorSyncConfig
from shardsieve.testing.event_loop import LoopThread
from shardsieve.testing.procs import wait_until
from shardsieve.testing.replica_feed import StreamedFeed
from shardsieve.v1 import routing_pb2, routing_pb2_grpc, sync_pb2_grpc

NODE = "node-tern-3"
G = Geometry(bits=16384, hashes=5, seed=4)
KEYS = [f"tern-crate-{i}".encode() for i in range(50)]
MAX_PENDING = 2
HELLO_TIMEOUT_S = 0.5


class Coordinator:
    """The coordinator's state, sync servicer and Router behind one grpc.aio server."""

    def __init__(self, loop: LoopThread) -> None:
        self.loop = loop
        self.state: CoordinatorState = wire_state(Policy(mode="safe", stale_after_s=60.0),
                                                  sync_config=CoordinatorSyncConfig(install_off_call=True))
        self.work = ThreadPoolExecutor(max_workers=2, thread_name_prefix="coordinator-work")
        self.state.shell.executor = self.work
        self.gate = threading.Event()
        self.install_threads: list[str] = []
        run_install = self.state.shell.run_install

        def held_install(job: Any) -> None:          # the worker thread waits for the test
            self.install_threads.append(threading.current_thread().name)
            assert self.gate.wait(30)
            run_install(job)
        self.state.shell.run_install = held_install  # type: ignore[method-assign]
        self.sync = SyncService(self.state.shell, admission=StreamAdmission(max_pending=MAX_PENDING),
                                hello_timeout_s=HELLO_TIMEOUT_S)
        self.state.shell.subscribe(self.sync.on_event)

        async def start() -> tuple[Any, Prober, int]:
            prober = Prober()
            router = Router(self.state.candidates, self.state.shell, self.state.membership, self.state.hints,
                            self.state.accounting, self.state.policy, prober)
            server = grpc.aio.server()
            add_router_service(RouterService(router), server)
            sync_pb2_grpc.add_FilterSyncServicer_to_server(self.sync, server)
            port = server.add_insecure_port("127.0.0.1:0")
            await server.start()
            return server, prober, port

        self.server, self.prober, port = loop.run(start())
        self.address = f"127.0.0.1:{port}"
        self.channel = grpc.insecure_channel(self.address)
        self.router = routing_pb2_grpc.RouterStub(self.channel)

    def close(self) -> None:
        self.gate.set()
        self.channel.close()
        self.loop.run(self.server.stop(0))
        self.loop.run(self.prober.close())
        self.work.shutdown()


@pytest.fixture()
def coordinator() -> Iterator[Coordinator]:
    with LoopThread("coordinator-loop") as loop:
        coord = Coordinator(loop)
        try:
            yield coord
        finally:
            coord.close()


def candidates(coord: Coordinator, key: bytes) -> dict[str, bool]:
    reply = coord.router.Locate(routing_pb2.LocateRequest(key=key), timeout=10)
    return {c.node_id: c.stale for c in reply.candidates}


def test_a_snapshot_installs_off_the_loop_while_locate_is_answered(coordinator: Coordinator) -> None:
    bloom = BloomFilter(G)
    bloom.add_positions(positions(KEYS, G))

    async def connect() -> tuple[grpc.aio.Channel, StreamedFeed]:
        channel = grpc.aio.insecure_channel(coordinator.address)
        feed = StreamedFeed(channel, NODE, bloom, address="127.0.0.1:7103", key_count=len(KEYS))
        feed.connect()
        return channel, feed
    channel, feed = coordinator.loop.run(connect())
    wait_until(lambda: coordinator.install_threads, 10, message="the snapshot handed to a worker thread")
    assert coordinator.install_threads[0].startswith("coordinator-work")
    # the install is held in its worker thread: the loop still answers, and safe mode lists the
    # node (known, no replica committed yet) as stale for every key
    assert candidates(coordinator, KEYS[0]) == {NODE: True}
    assert not feed.acked.is_set()
    coordinator.gate.set()
    coordinator.loop.run(asyncio.wait_for(feed.acked.wait(), 10))
    for key in KEYS:
        assert candidates(coordinator, key) == {NODE: False}, key      # listed by its filter, fresh

    async def close() -> None:
        await feed.close()
        await channel.close()
    coordinator.loop.run(close())


def test_hello_less_streams_past_the_pending_cap_are_refused_and_the_rest_time_out(
        coordinator: Coordinator) -> None:
    async def idle_streams(n: int) -> list[grpc.aio.AioRpcError]:
        channel = grpc.aio.insecure_channel(coordinator.address)
        stub = sync_pb2_grpc.FilterSyncStub(channel)
        calls = [stub.Stream() for _ in range(n)]

        async def outcome(call: Any) -> grpc.aio.AioRpcError:
            with pytest.raises(grpc.aio.AioRpcError) as ended:
                await call.read()
            return ended.value
        try:
            return await asyncio.wait_for(asyncio.gather(*(outcome(c) for c in calls)), 30)
        finally:
            await channel.close()

    ends = coordinator.loop.run(idle_streams(MAX_PENDING + 3), timeout=60)
    refused = [e for e in ends if e.code() == grpc.StatusCode.RESOURCE_EXHAUSTED]
    timed_out = [e for e in ends if e.code() == grpc.StatusCode.DEADLINE_EXCEEDED]
    assert len(refused) == 3 and len(timed_out) == MAX_PENDING
    assert all("setting max-pending-streams" in (e.details() or "") for e in refused)
    assert all("setting hello-timeout-ms" in (e.details() or "") for e in timed_out)
    admission = coordinator.sync.admission
    assert (admission.open, admission.pending, admission.hello_timeouts) == (0, 0, MAX_PENDING)
    assert admission.refused == {"max-pending-streams": 3}
