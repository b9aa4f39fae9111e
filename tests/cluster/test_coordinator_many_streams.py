"""Two hundred node streams into one real coordinator process: more than the 32 gRPC worker
threads the coordinator used to have, each of which a sync stream used to hold for its whole
life (docs/coordinator.md, "Event loop and threads": a stream now costs no thread).

Two hundred simulated nodes speak the real sync protocol over real gRPC streams from this
process (shardsieve/testing/replica_feed.py `StreamedFeed`, one grpc.aio channel each). They
connect in waves; between waves and at the end, Locate must list every key's node — the
reference is the Bloom filter each simulated node built from its own keys (a Bloom filter holds
every inserted key: Bloom 1970) — and once all are connected every node must be fresh.
"""

from __future__ import annotations

import asyncio
from pathlib import Path
from typing import Iterator

import grpc
import pytest

from shardsieve.bloom import BloomFilter
from shardsieve.geometry import geometry_for
from shardsieve.hashing import positions
from shardsieve.testing.event_loop import LoopThread
from shardsieve.testing.procs import DaemonProcess, free_port, shardsieve_argv, start_daemon, wait_until
from shardsieve.testing.replica_feed import StreamedFeed
from shardsieve.v1 import admin_pb2, admin_pb2_grpc, routing_pb2, routing_pb2_grpc

pytestmark = pytest.mark.cluster

NODES = 200
WAVES = 4
KEYS_PER_NODE = 20
GEOMETRY = geometry_for(100, 0.01)


def node_id(n: int) -> str:
    return f"node-raft-{n:03d}"


def node_keys(n: int) -> list[bytes]:
    return [f"kelp-crate-{n:03d}-{i:02d}".encode() for i in range(KEYS_PER_NODE)]


@pytest.fixture()
def coordinator(tmp_path: Path) -> Iterator[DaemonProcess]:
    address = f"127.0.0.1:{free_port()}"
    # One process plays every node, so the per-host stream limit is raised past NODES.
    proc = start_daemon(shardsieve_argv("coordinator", "--listen", address, "--log-format", "text",
                                        "--max-streams-per-peer", str(4 * NODES), "--stale-after-s", "5"),
                        tmp_path / "coordinator.log", health_address=address)
    try:
        yield proc
    finally:
        proc.stop()


def threads_of(pid: int) -> int:
    """Threads of a process (proc(5): one entry per thread under /proc/PID/task)."""
    return len(list(Path(f"/proc/{pid}/task").iterdir()))


def test_two_hundred_node_streams_are_served_and_all_fresh_while_locate_answers(
        coordinator: DaemonProcess) -> None:
    address = coordinator.health_address
    assert address is not None
    router = routing_pb2_grpc.RouterStub(grpc.insecure_channel(address))
    admin = admin_pb2_grpc.AdminStub(grpc.insecure_channel(address))

    def locate_lists_every_owner(owners: range) -> bool:
        keys = [k for n in owners for k in node_keys(n)]
        reply = router.LocateBatch(routing_pb2.LocateBatchRequest(keys=keys), timeout=10)
        for i, result in enumerate(reply.results):
            owner = node_id(owners[i // KEYS_PER_NODE])
            assert owner in {c.node_id for c in result.candidates}, (keys[i], owner)
        return True

    with LoopThread("simulated-nodes") as loop:
        feeds: list[StreamedFeed] = []
        channels: list[grpc.aio.Channel] = []

        async def connect(wave: range) -> None:
            for n in wave:
                bloom = BloomFilter(GEOMETRY)
                bloom.add_positions(positions(node_keys(n), GEOMETRY))
                channel = grpc.aio.insecure_channel(address)
                channels.append(channel)
                feed = StreamedFeed(channel, node_id(n), bloom, address=f"127.0.0.1:{20000 + n}",
                                    capacity=100, key_count=KEYS_PER_NODE)
                feed.connect()
                feeds.append(feed)
            await asyncio.wait_for(asyncio.gather(*(feeds[n].acked.wait() for n in wave)), 60)

        async def heartbeats() -> None:          # what keeps a synced node fresh
            while True:
                await asyncio.sleep(1.0)
                for feed in feeds:
                    feed.heartbeat()

        beating = loop.run(_start(heartbeats()))
        per_wave = NODES // WAVES
        try:
            for w in range(WAVES):
                loop.run(connect(range(w * per_wave, (w + 1) * per_wave)), timeout=90)
                # the streams are open at once: they cost no thread each
                assert threads_of(coordinator.pid) < NODES // 2, threads_of(coordinator.pid)
                assert locate_lists_every_owner(range(0, (w + 1) * per_wave))

            def all_fresh() -> bool:
                nodes = admin.FleetStatus(admin_pb2.FleetStatusRequest(), timeout=10).nodes
                return len(nodes) == NODES and all(n.state == "fresh" and n.connected for n in nodes)
            wait_until(all_fresh, 60, message=f"all {NODES} simulated nodes fresh")
            assert locate_lists_every_owner(range(NODES))
            single = router.Locate(routing_pb2.LocateRequest(key=node_keys(7)[3]), timeout=10)
            assert node_id(7) in {c.node_id for c in single.candidates}
            assert not any(c.stale for c in single.candidates)        # all fresh: nobody listed as stale
            assert all(feed.ended is None for feed in feeds)          # no stream was dropped on the way
        finally:
            beating.cancel()

            async def close_all() -> None:
                for feed in feeds:
                    await feed.close()
                for channel in channels:
                    await channel.close()
            loop.run(close_all(), timeout=60)
    assert coordinator.alive()
    assert "Traceback" not in coordinator.log_text()


async def _start(coro: object) -> asyncio.Task[None]:
    return asyncio.ensure_future(coro)  # type: ignore[arg-type]
