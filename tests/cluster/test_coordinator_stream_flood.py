"""A flood against a coordinator that authenticates nodes by token: hundreds of idle TCP/HTTP2
connections and hundreds of sync streams that never send a Hello (and carry no token).

Expected (docs/security.md, "Limits"; docs/coordinator.md, "Stream admission"): the real nodes
stay fresh and Locate keeps listing the node of every written key throughout; no more than
max-pending-streams Hello-less streams are held at once, every other one is refused
RESOURCE_EXHAUSTED with the reason naming that setting; the held ones are closed
DEADLINE_EXCEEDED once hello-timeout-ms has passed. The counts are read back from the
coordinator's metrics too. The HTTP/2 connection preface sent by the idle connections is the
one of RFC 9113, section 3.4.
"""

from __future__ import annotations

import asyncio
import socket
import urllib.request
from pathlib import Path
from typing import Iterator

import grpc
import pytest

from shardsieve.localcluster import LocalCluster
from shardsieve.testing.event_loop import LoopThread
from shardsieve.testing.procs import wait_until
from shardsieve.v1 import routing_pb2, sync_pb2_grpc

pytestmark = pytest.mark.cluster

NODE_TOKEN = "kelp-raft-sync-5a1e"
MAX_PENDING = 40
HELLO_TIMEOUT_MS = 6000
IDLE_CONNECTIONS = 300
IDLE_STREAMS = 300
CHANNELS = 10
KEYS = [f"kelp-flood-crate-{i:03d}".encode() for i in range(60)]
# RFC 9113, section 3.4: the client connection preface, then a SETTINGS frame (here empty:
# length 0, type 0x4, no flags, stream 0)
HTTP2_PREFACE = b"PRI * HTTP/2.0\r\n\r\nSM\r\n\r\n" + bytes([0, 0, 0, 0x4, 0, 0, 0, 0, 0])


@pytest.fixture()
def cluster(tmp_path: Path) -> Iterator[LocalCluster]:
    args = ["--node-token", f"node-1={NODE_TOKEN}", "--node-token", f"node-2={NODE_TOKEN}",
            "--max-pending-streams", str(MAX_PENDING), "--hello-timeout-ms", str(HELLO_TIMEOUT_MS),
            # this test's streams all come from one host, as the nodes' do: the per-host cap stays out of the way
            "--max-streams-per-peer", str(4 * IDLE_STREAMS)]
    with LocalCluster(tmp_path, nodes=2, capacity=2000, metrics=True, extra_coordinator_args=args,
                      extra_node_args=["--sync-token", NODE_TOKEN]) as c:
        yield c


def metrics(cluster: LocalCluster) -> dict[str, float]:
    text = urllib.request.urlopen(f"http://127.0.0.1:{cluster.coordinator_metrics_port}/metrics",
                                  timeout=5).read().decode()
    out = {}
    for line in text.splitlines():
        if line.startswith("shardsieve_coordinator_sync_streams"):
            name, _, value = line.rpartition(" ")
            out[name] = float(value)
    return out


def test_idle_connections_and_hello_less_streams_leave_the_nodes_fresh(cluster: LocalCluster) -> None:
    address = cluster.coordinator_address
    host, port = address.rsplit(":", 1)
    router = cluster.router()
    nodes_of = {key: router.Write(routing_pb2.WriteRequest(key=key, value=b"bladder wrack"), timeout=10).node_id
                for key in KEYS}
    wait_until(lambda: len(cluster.fleet_status().nodes) == 2 and cluster.all_fresh(), 20,
               message="both nodes fresh after the writes")

    def routable() -> bool:
        reply = router.LocateBatch(routing_pb2.LocateBatchRequest(keys=KEYS), timeout=10)
        return all(nodes_of[k] in {c.node_id for c in r.candidates} for k, r in zip(KEYS, reply.results))

    assert cluster.all_fresh() and routable()
    sockets = []
    for _ in range(IDLE_CONNECTIONS):
        sock = socket.create_connection((host, int(port)), timeout=10)
        sock.sendall(HTTP2_PREFACE)
        sockets.append(sock)

    outcomes: list[grpc.aio.AioRpcError | str] = []
    with LoopThread("flood") as loop:
        channels: list[grpc.aio.Channel] = []

        async def hold(stub: sync_pb2_grpc.FilterSyncStub) -> None:
            call = stub.Stream()          # no token, and no message ever
            try:
                reply = await call.read()
                outcomes.append(f"unexpected reply {reply!r}")
            except grpc.aio.AioRpcError as exc:
                outcomes.append(exc)

        async def flood() -> None:
            for _ in range(CHANNELS):
                channels.append(grpc.aio.insecure_channel(address))
            for i in range(IDLE_STREAMS):
                asyncio.ensure_future(hold(sync_pb2_grpc.FilterSyncStub(channels[i % CHANNELS])))

        loop.run(flood())
        samples: list[tuple[bool, float]] = []

        def flood_over() -> bool:
            pending = metrics(cluster).get('shardsieve_coordinator_sync_streams{state="pending"}', -1.0)
            samples.append((cluster.all_fresh() and routable(), pending))
            return len(outcomes) == IDLE_STREAMS
        try:
            wait_until(flood_over, 60 + HELLO_TIMEOUT_MS / 1000, interval=0.2,
                       message="every Hello-less stream refused or closed")
        finally:
            async def close() -> None:
                for channel in channels:
                    await channel.close()
            loop.run(close())
    try:
        assert len(samples) >= 3
        assert all(ok for ok, _ in samples), samples          # fresh and routable at every look
        assert max(p for _, p in samples) <= MAX_PENDING      # never more held than the cap
        refused = [o for o in outcomes if isinstance(o, grpc.aio.AioRpcError)
                   and o.code() == grpc.StatusCode.RESOURCE_EXHAUSTED]
        closed = [o for o in outcomes if isinstance(o, grpc.aio.AioRpcError)
                  and o.code() == grpc.StatusCode.DEADLINE_EXCEEDED]
        assert len(refused) + len(closed) == IDLE_STREAMS, [o for o in outcomes if o not in refused + closed][:3]
        for o in refused:
            assert "have not sent their Hello yet" in o.details() and "setting max-pending-streams" in o.details()
        for o in closed:
            assert "no Hello within" in o.details() and "setting hello-timeout-ms" in o.details()
        # all were opened well within the Hello deadline: exactly the cap was held, the rest refused
        assert len(closed) == MAX_PENDING and len(refused) == IDLE_STREAMS - MAX_PENDING
        counts = metrics(cluster)
        assert counts['shardsieve_coordinator_sync_streams_refused_total{limit="max-pending-streams"}'] == len(refused)
        assert counts["shardsieve_coordinator_sync_streams_without_hello_total"] == len(closed)
        wait_until(lambda: metrics(cluster)['shardsieve_coordinator_sync_streams{state="pending"}'] == 0, 10,
                   message="no stream pending once the flood is over")
        assert metrics(cluster)['shardsieve_coordinator_sync_streams{state="open"}'] == 2   # the two nodes
        assert cluster.all_fresh() and routable()
    finally:
        for sock in sockets:
            sock.close()
