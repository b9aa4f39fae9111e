"""Hostile clients against real coordinator and node processes on loopback.

Each attack gets its specific gRPC status and leaves the coordinator's state unchanged: the
per-node replica position (epoch, sequence, geometry, key count, fill) and the routing answers
for the written keys and for absent keys are compared before and after. The expected status
codes are the ones documented for each case in docs/security.md and proto/shardsieve/v1/sync.proto
("Identity checks may refuse with PERMISSION_DENIED; a malformed stream ends with
INVALID_ARGUMENT"); gRPC's status code meanings are from the gRPC docs (doc/statuscodes.md).
"""

from __future__ import annotations

import queue
import random
import re
import threading
import urllib.request
from pathlib import Path
from typing import Any, Iterator

import grpc
import pytest

from shardsieve.bloom import BloomFilter
from shardsieve.cli.certs import make_dev_pki
from shardsieve.geometry import Geometry
from shardsieve.localcluster import LocalCluster
from shardsieve.security import channel_credentials
from shardsieve.snapshot import encode_snapshot
from shardsieve.testing.procs import wait_until
from shardsieve.testing.procs import free_port, shardsieve_argv
from shardsieve.v1 import admin_pb2, filter_pb2, routing_pb2, storage_pb2, sync_pb2, sync_pb2_grpc

pytestmark = pytest.mark.cluster

ADMIN_TOKEN = "kelpline-admin-7f3a"
WRITE_TOKEN = "kelpline-write-88e1"
STORAGE_TOKEN = "kelpline-storage-2a4c"
READ_TOKEN = "kelpline-read-19bd"
NODE_TOKEN = "kelpline-node1-c0de"
SPARE_TOKEN = "kelpline-spare-51ee"
KEYS = [f"kelpline-crate-{i:04d}".encode() for i in range(300)]
MAX_VALUE = 4096          # coordinator max-value-bytes in the token-mode fixture
MAX_BATCH_KEYS = 1000     # coordinator max-batch-keys (>= the 600 keys coordinator_state asks for)
ABSENT = [f"kelpline-ghost-{i:04d}".encode() for i in range(300)]
_CLOSE = object()


class FakeNode:
    """A hand-driven FilterSync stream: send NodeMessages, read replies or the final status."""

    def __init__(self, address: str, metadata: tuple[tuple[str, str], ...] = (),
                 credentials: grpc.ChannelCredentials | None = None, raw: bool = False) -> None:
        self.channel = (grpc.secure_channel(address, credentials) if credentials
                        else grpc.insecure_channel(address))
        self._out: queue.Queue[Any] = queue.Queue()
        self.replies: queue.Queue[Any] = queue.Queue()
        if raw:
            method = self.channel.stream_stream("/shardsieve.v1.FilterSync/Stream",
                                                request_serializer=lambda b: b,
                                                response_deserializer=sync_pb2.CoordinatorMessage.FromString)
        else:
            method = sync_pb2_grpc.FilterSyncStub(self.channel).Stream
        self.call = method(self._requests(), metadata=metadata, timeout=30)
        threading.Thread(target=self._read, daemon=True).start()

    def _requests(self) -> Iterator[Any]:
        while (item := self._out.get()) is not _CLOSE:
            yield item

    def _read(self) -> None:
        try:
            for reply in self.call:
                self.replies.put(reply)
            self.replies.put(grpc.StatusCode.OK)
        except grpc.RpcError as exc:
            self.replies.put(exc)

    def send(self, *msgs: Any) -> FakeNode:
        for m in msgs:
            self._out.put(m)
        return self

    def recv(self, timeout: float = 10.0) -> Any:
        """The next reply (CoordinatorMessage) or the RpcError that ended the stream."""
        return self.replies.get(timeout=timeout)

    def status(self, timeout: float = 10.0) -> grpc.StatusCode:
        """Wait for the end of the stream; its status code."""
        while True:
            item = self.recv(timeout)
            if isinstance(item, grpc.RpcError):
                return item.code()
            if item is grpc.StatusCode.OK:
                return item

    def close(self) -> None:
        self._out.put(_CLOSE)
        self.call.cancel()
        self.channel.close()


def hello(node_id: str, geometry: Geometry, **kw: Any) -> sync_pb2.NodeMessage:
    fields: dict[str, Any] = dict(node_id=node_id, storage_address="127.0.0.1:9", geometry=geometry.to_proto(),
                                  epoch=1, sequence=0, capacity=100, target_fpr=0.01, push_interval_ms=50,
                                  protocol_version=1)
    fields.update(kw)
    return sync_pb2.NodeMessage(hello=sync_pb2.Hello(**fields))


def snapshot_msgs(bloom: BloomFilter, key_count: int, snapshot_id: int = 1, sequence: int = 0) -> list[Any]:
    enc = encode_snapshot(bloom)
    return [sync_pb2.NodeMessage(snapshot_chunk=filter_pb2.SnapshotChunk(
        snapshot_id=snapshot_id, epoch=1, sequence=sequence, geometry=bloom.geometry.to_proto(),
        encoding=enc.encoding, purpose=filter_pb2.SNAPSHOT_PURPOSE_RESYNC, chunk_index=i,
        chunk_count=enc.chunk_count, total_bytes=enc.total_bytes, data=data, checksum=bloom.checksum,
        key_count=key_count, capacity=100)) for i, data in enumerate(enc.chunks)]


def coordinator_state(cluster: LocalCluster, metadata: Any = ()) -> tuple[Any, Any]:
    """(per-node replica position and checksum, routing answers for written and absent keys)."""
    status = cluster.fleet_status()
    positions = sorted((n.node_id, n.epoch, n.sequence, n.checksum, n.key_count, round(n.fill, 9),
                        n.geometry.SerializeToString()) for n in status.nodes)
    reply = cluster.router().LocateBatch(routing_pb2.LocateBatchRequest(keys=KEYS + ABSENT), timeout=10,
                                         metadata=metadata)
    answers = [sorted(c.node_id for c in r.candidates) for r in reply.results]
    return positions, answers


def write_keys(cluster: LocalCluster, metadata: Any = ()) -> None:
    router = cluster.router()
    for k in KEYS:
        router.Write(routing_pb2.WriteRequest(key=k, value=b"crate manifest " + k), timeout=10, metadata=metadata)


def settle(cluster: LocalCluster, metadata: Any = ()) -> None:
    """Wait until the coordinator applied every write (key counts add up, no read-your-writes hints)."""
    def done() -> bool:
        counts = sum(n.key_count for n in cluster.fleet_status().nodes if n.node_id.startswith("node-"))
        reply = cluster.router().LocateBatch(routing_pb2.LocateBatchRequest(keys=KEYS), timeout=10,
                                             metadata=metadata)
        return counts == len(KEYS) and not any(c.hinted for r in reply.results for c in r.candidates)
    wait_until(done, 20, message="every write applied at the coordinator")


def rpc_code(fn: Any, *args: Any, **kw: Any) -> grpc.StatusCode:
    try:
        fn(*args, **kw)
    except grpc.RpcError as exc:
        return exc.code()
    return grpc.StatusCode.OK


# --------------------------------------------------------------------------- mutual TLS cluster


def test_cluster_runs_entirely_over_mutual_tls(tmp_path: Path) -> None:
    pki = tmp_path / "pki"
    make_dev_pki(pki, ["node-1", "node-2"])
    other = tmp_path / "other-pki"
    make_dev_pki(other, ["node-1"])
    with LocalCluster(tmp_path / "c", nodes=2, capacity=2000, tls_dir=pki) as cluster:
        write_keys(cluster)
        reads = [cluster.router().Read(routing_pb2.ReadRequest(key=k), timeout=10) for k in KEYS[:20]]
        assert all(r.found and r.value == b"crate manifest " + k for r, k in zip(reads, KEYS[:20]))
        settle(cluster)
        before = coordinator_state(cluster)
        assert all(before[1][i] for i in range(len(KEYS)))          # every written key is routable

        coord, node1 = cluster.coordinator_address, cluster.node_handles["node-1"].address
        from grpc_health.v1 import health_pb2, health_pb2_grpc

        def health_code(address: str, creds: grpc.ChannelCredentials | None) -> grpc.StatusCode:
            ch = grpc.secure_channel(address, creds) if creds else grpc.insecure_channel(address)
            with ch:
                return rpc_code(health_pb2_grpc.HealthStub(ch).Check, health_pb2.HealthCheckRequest(), timeout=3)

        # a refused TLS handshake never reaches a servicer; gRPC reports it as UNAVAILABLE
        for address in (coord, node1):
            assert health_code(address, channel_credentials(pki / "ca.pem", pki / "operator.pem",
                                                            pki / "operator-key.pem")) == grpc.StatusCode.OK
            assert health_code(address, None) == grpc.StatusCode.UNAVAILABLE                   # plaintext
            assert health_code(address, channel_credentials(pki / "ca.pem")) == grpc.StatusCode.UNAVAILABLE
            assert health_code(address, channel_credentials(
                pki / "ca.pem", other / "node-1.pem", other / "node-1-key.pem")) == grpc.StatusCode.UNAVAILABLE

        # node-2's certificate speaking for node-1: refused and logged
        geometry = Geometry(bits=1 << 10, hashes=3)
        spoof = FakeNode(coord, credentials=channel_credentials(pki / "ca.pem", pki / "node-2.pem",
                                                                pki / "node-2-key.pem"))
        assert spoof.send(hello("node-1", geometry)).status() == grpc.StatusCode.PERMISSION_DENIED
        spoof.close()
        # the operator certificate (a valid one) cannot claim a node id either
        oper = FakeNode(coord, credentials=cluster.credentials())
        assert oper.send(hello("node-2", geometry)).status() == grpc.StatusCode.PERMISSION_DENIED
        oper.close()
        assert coordinator_state(cluster) == before
        assert cluster.all_fresh()
        log = cluster.coordinator.log_text() if cluster.coordinator else ""
        assert "sync stream refused: identity" in log and "issued to 'node-2'" in log
        assert "listening with TLS" in log and "PLAINTEXT" not in log

        # the operator CLI over mutual TLS (flags), and refused without them
        from click.testing import CliRunner

        from shardsieve.cli.main import cli
        tls_flags = ["--tls-ca", str(pki / "ca.pem"), "--tls-cert", str(pki / "operator.pem"),
                     "--tls-key", str(pki / "operator-key.pem")]
        ok = CliRunner().invoke(cli, ["status", "--coordinator", coord, "--json", *tls_flags], env={"HOME": str(tmp_path)})
        assert ok.exit_code == 0, ok.output
        assert '"node-1"' in ok.output and '"node-2"' in ok.output
        bare = CliRunner().invoke(cli, ["status", "--coordinator", coord, "--timeout", "2"], env={"HOME": str(tmp_path)})
        assert bare.exit_code == 3, bare.output                # EXIT_UNREACHABLE (docs/cli.md)

        # the load tester seeds the nodes directly: over mutual TLS too, with zero false negatives
        import json as _json
        lt = CliRunner().invoke(cli, ["loadtest", "--coordinator", coord, "--keys", "200", "--count", "300",
                                      "--concurrency", "2", "--seed", "3", "--json", *tls_flags],
                                env={"HOME": str(tmp_path)})
        assert lt.exit_code == 0, lt.output
        report = _json.loads(lt.output[lt.output.index("{"):])
        assert report["lookups"] == 300 and report["false_negatives"] == 0


# --------------------------------------------------------------------------- token mode


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LocalCluster]:
    coordinator_args = ["--node-token", f"node-1={NODE_TOKEN}", "--node-token", f"spare={SPARE_TOKEN}",
                        "--node-token", f"spare2={SPARE_TOKEN}", "--read-token", READ_TOKEN,
                        "--write-token", WRITE_TOKEN,
                        "--max-streams-per-peer", "4", "--hello-timeout-ms", "60000",
                        "--max-message-bytes", str(1 << 20),
                        "--max-filter-bits", str(1 << 20), "--max-snapshot-chunks", "4", "--mode", "fast",
                        "--max-value-bytes", str(MAX_VALUE), "--max-batch-keys", str(MAX_BATCH_KEYS),
                        "--auto-rebuild", "false", "--node-storage-token", STORAGE_TOKEN]
    with LocalCluster(tmp_path_factory.mktemp("sec"), nodes=1, capacity=2000, token=ADMIN_TOKEN, metrics=True,
                      extra_coordinator_args=coordinator_args,
                      extra_node_args=["--sync-token", NODE_TOKEN, "--token", STORAGE_TOKEN]) as c:
        write_keys(c, (("authorization", f"Bearer {WRITE_TOKEN}"),))
        settle(c, (("authorization", f"Bearer {READ_TOKEN}"),))
        yield c


READ_MD = (("authorization", f"Bearer {READ_TOKEN}"),)
ADMIN_MD = (("authorization", f"Bearer {ADMIN_TOKEN}"),)
WRITE_MD = (("authorization", f"Bearer {WRITE_TOKEN}"),)
GEOMETRY = Geometry(bits=1 << 10, hashes=3)


def test_wrong_or_missing_tokens_are_unauthenticated(cluster: LocalCluster) -> None:
    before = coordinator_state(cluster, READ_MD)
    admin, router = cluster.admin(), cluster.router()
    for md in ((), (("authorization", "Bearer wrong"),), READ_MD, WRITE_MD):   # no other token opens Admin
        assert rpc_code(admin.FleetStatus, admin_pb2.FleetStatusRequest(), timeout=5, metadata=md) \
            == grpc.StatusCode.UNAUTHENTICATED
        assert rpc_code(admin.SetPolicy, admin_pb2.PolicySetRequest(values={"growth": "9"}), timeout=5,
                        metadata=md) == grpc.StatusCode.UNAUTHENTICATED
    for md in ((), (("authorization", "Bearer wrong"),), READ_MD, ADMIN_MD):   # nor Write/Remove
        assert rpc_code(router.Write, routing_pb2.WriteRequest(key=b"kelpline-intruder", value=b"x"), timeout=5,
                        metadata=md) == grpc.StatusCode.UNAUTHENTICATED
        assert rpc_code(router.Remove, routing_pb2.RemoveRequest(key=KEYS[0]), timeout=5, metadata=md) \
            == grpc.StatusCode.UNAUTHENTICATED
    for md in ((), (("authorization", "Bearer wrong"),)):
        assert rpc_code(router.Locate, routing_pb2.LocateRequest(key=KEYS[0]), timeout=5, metadata=md) \
            == grpc.StatusCode.UNAUTHENTICATED
        assert rpc_code(router.Read, routing_pb2.ReadRequest(key=KEYS[0]), timeout=5, metadata=md) \
            == grpc.StatusCode.UNAUTHENTICATED
    assert coordinator_state(cluster, READ_MD) == before
    assert router.Read(routing_pb2.ReadRequest(key=KEYS[0]), timeout=5, metadata=READ_MD).found
    assert admin.GetPolicy(admin_pb2.PolicyGetRequest(), timeout=5, metadata=ADMIN_MD).growth != 9
    log = cluster.coordinator.log_text() if cluster.coordinator else ""
    # the node's storage API wants its own token; the coordinator's probes carry it (the reads above)
    storage = cluster.storage("node-1")
    for md in ((), WRITE_MD, (("authorization", "Bearer wrong"),)):
        assert rpc_code(storage.Put, storage_pb2.PutRequest(key=b"kelpline-direct", value=b"x"), timeout=5,
                        metadata=md) == grpc.StatusCode.UNAUTHENTICATED
        assert rpc_code(storage.Get, storage_pb2.GetRequest(key=KEYS[0]), timeout=5, metadata=md) \
            == grpc.StatusCode.UNAUTHENTICATED
    assert storage.Get(storage_pb2.GetRequest(key=KEYS[0]), timeout=5,
                       metadata=(("authorization", f"Bearer {STORAGE_TOKEN}"),)).found
    assert coordinator_state(cluster, READ_MD) == before
    node_log = cluster.node_process("node-1").log_text()
    for secret in (ADMIN_TOKEN, WRITE_TOKEN, READ_TOKEN, NODE_TOKEN, SPARE_TOKEN, STORAGE_TOKEN):
        assert secret not in node_log
    for secret in (ADMIN_TOKEN, WRITE_TOKEN, READ_TOKEN, NODE_TOKEN, SPARE_TOKEN, STORAGE_TOKEN):
        assert secret not in log                                      # tokens are never logged
    # this fleet listens in plaintext (allowed explicitly): both daemons said so at start
    assert "listening in PLAINTEXT" in log and "listening in PLAINTEXT" in node_log


def test_spoofed_node_ids_are_permission_denied(cluster: LocalCluster) -> None:
    before = coordinator_state(cluster, READ_MD)
    cases = [("node-1", ()), ("node-1", (("authorization", "Bearer guess"),)),
             ("node-1", (("authorization", f"Bearer {SPARE_TOKEN}"),)),     # another node's token
             ("unlisted", (("authorization", f"Bearer {NODE_TOKEN}"),))]
    for node_id, md in cases:
        fake = FakeNode(cluster.coordinator_address, md)
        assert fake.send(hello(node_id, GEOMETRY)).status() == grpc.StatusCode.PERMISSION_DENIED, node_id
        fake.close()
    assert coordinator_state(cluster, READ_MD) == before
    assert cluster.all_fresh()                        # the real node-1 kept its stream
    log = cluster.coordinator.log_text() if cluster.coordinator else ""
    assert len(re.findall(r"sync stream refused: identity", log)) >= len(cases)


def test_oversized_requests_and_messages(cluster: LocalCluster) -> None:
    before = coordinator_state(cluster, READ_MD)
    router = cluster.router()
    # past the gRPC message limit (max-message-bytes = 1 MiB)
    assert rpc_code(router.Write, routing_pb2.WriteRequest(key=b"kelpline-big", value=b"x" * (2 << 20)), timeout=10,
                    metadata=WRITE_MD) == grpc.StatusCode.RESOURCE_EXHAUSTED
    assert rpc_code(router.Locate, routing_pb2.LocateRequest(key=b"k" * (65 * 1024)), timeout=10,
                    metadata=READ_MD) == grpc.StatusCode.INVALID_ARGUMENT                   # max-key-bytes
    assert rpc_code(router.Write, routing_pb2.WriteRequest(key=b"kelpline-wide", value=b"x" * (MAX_VALUE + 1)),
                    timeout=10, metadata=WRITE_MD) == grpc.StatusCode.INVALID_ARGUMENT      # max-value-bytes
    assert rpc_code(router.LocateBatch, routing_pb2.LocateBatchRequest(keys=[b"k"] * (MAX_BATCH_KEYS + 1)),
                    timeout=10, metadata=READ_MD) == grpc.StatusCode.INVALID_ARGUMENT       # max-batch-keys
    for refused in (b"kelpline-big", b"kelpline-wide"):                     # neither write reached a node
        assert not router.Read(routing_pb2.ReadRequest(key=refused), timeout=10, metadata=READ_MD).found
    md = (("authorization", f"Bearer {SPARE_TOKEN}"),)
    big = Geometry(bits=1 << 21, hashes=3)                                   # above max-filter-bits
    assert FakeNode(cluster.coordinator_address, md).send(hello("spare", big)).status() \
        == grpc.StatusCode.RESOURCE_EXHAUSTED
    chunks = FakeNode(cluster.coordinator_address, md).send(hello("spare", GEOMETRY))
    assert chunks.recv().WhichOneof("body") == "need_snapshot"
    chunks.send(sync_pb2.NodeMessage(snapshot_chunk=filter_pb2.SnapshotChunk(
        snapshot_id=1, epoch=1, geometry=GEOMETRY.to_proto(), encoding=3, chunk_count=5, total_bytes=100,
        data=b"x")))                                                         # above max-snapshot-chunks
    assert chunks.status() == grpc.StatusCode.RESOURCE_EXHAUSTED
    assert coordinator_state(cluster, READ_MD)[1] == before[1]
    assert [p for p in coordinator_state(cluster, READ_MD)[0] if p[0] == "node-1"] == \
        [p for p in before[0] if p[0] == "node-1"]


def test_malformed_messages(cluster: LocalCluster) -> None:
    before = coordinator_state(cluster, READ_MD)
    md = (("authorization", f"Bearer {SPARE_TOKEN}"),)
    addr = cluster.coordinator_address
    assert FakeNode(addr, md, raw=True).send(b"\x0a\xff\xff\xff\xff\x0f").status() == grpc.StatusCode.INVALID_ARGUMENT
    assert FakeNode(addr, md).send(sync_pb2.NodeMessage()).status() == grpc.StatusCode.INVALID_ARGUMENT
    assert FakeNode(addr, md).send(sync_pb2.NodeMessage(delta=filter_pb2.Delta(sequence=1))).status() \
        == grpc.StatusCode.FAILED_PRECONDITION                                      # no Hello first
    assert FakeNode(addr, md).send(hello("spare", GEOMETRY, protocol_version=99)).status() \
        == grpc.StatusCode.INVALID_ARGUMENT
    raw_write = cluster.channel(addr).unary_unary("/shardsieve.v1.Router/Write", request_serializer=lambda b: b,
                                                  response_deserializer=lambda b: b)
    assert rpc_code(raw_write, b"\x0a\xff\xff\xff\xff\x0f", timeout=5, metadata=WRITE_MD) \
        == grpc.StatusCode.INVALID_ARGUMENT
    assert coordinator_state(cluster, READ_MD)[1] == before[1]
    assert [p for p in coordinator_state(cluster, READ_MD)[0] if p[0] == "node-1"] == \
        [p for p in before[0] if p[0] == "node-1"]


def test_fuzzed_deltas_and_snapshots_change_nothing(cluster: LocalCluster) -> None:
    md = (("authorization", f"Bearer {SPARE_TOKEN}"),)
    bloom = BloomFilter(GEOMETRY)
    spare_keys = [f"kelpline-spare-{i}".encode() for i in range(20)]
    bloom.add_batch(spare_keys)
    fake = FakeNode(cluster.coordinator_address, md).send(hello("spare", GEOMETRY, checksum=bloom.checksum))
    assert fake.recv().WhichOneof("body") == "need_snapshot"
    fake.send(*snapshot_msgs(bloom, len(spare_keys)))
    assert fake.recv().WhichOneof("body") == "ack"
    before = coordinator_state(cluster, READ_MD)
    spare_before = cluster.router().LocateBatch(routing_pb2.LocateBatchRequest(keys=spare_keys), timeout=5,
                                                metadata=READ_MD)
    assert all("spare" in [c.node_id for c in r.candidates] for r in spare_before.results)
    rng = random.Random(20261201)
    # snapshot_verified: a rebuild-purpose snapshot not newer than the replica is confirmed, not installed
    allowed = {"need_snapshot", "ack", "snapshot_rejected", "snapshot_verified"}
    # Within every limit (limits have their own test), so each message reaches the protocol object.
    for i in range(150):
        if i % 3 == 0:
            msg = sync_pb2.NodeMessage(snapshot_chunk=filter_pb2.SnapshotChunk(
                snapshot_id=10 + i, epoch=1, sequence=rng.choice([0, 1, 2]), geometry=GEOMETRY.to_proto(),
                encoding=rng.randrange(5), purpose=rng.randrange(3), chunk_index=rng.randrange(3),
                chunk_count=rng.randrange(1, 4), total_bytes=rng.randrange(0, GEOMETRY.byte_size + 1),
                data=rng.randbytes(rng.randrange(0, 130)), checksum=rng.getrandbits(64), key_count=5))
        else:
            msg = sync_pb2.NodeMessage(delta=filter_pb2.Delta(
                epoch=1, sequence=1, payload=rng.randbytes(rng.randrange(0, 64)), checksum=rng.getrandbits(64),
                key_count=rng.randrange(100)))
        fake.send(msg)
    # A stream is read in order: once the coordinator shows this heartbeat's marker, it has handled
    # every fuzzed message before it.
    marker = 770_001
    fake.send(sync_pb2.NodeMessage(heartbeat=sync_pb2.Heartbeat(stats=sync_pb2.NodeStats(reads_missed=marker))))
    wait_until(lambda: {n.node_id: n for n in cluster.fleet_status().nodes}["spare"].reads_missed_reported == marker,
               15, message="the coordinator to handle the fuzzed messages and the marker heartbeat")
    kinds: list[str] = []
    while not fake.replies.empty():
        item = fake.replies.get_nowait()
        assert not isinstance(item, grpc.RpcError), item              # the stream survived all 150
        kinds.append(item.WhichOneof("body"))
    assert kinds, "the coordinator answered the fuzzed messages"
    assert set(kinds) <= allowed
    after = coordinator_state(cluster, READ_MD)
    assert after == before
    spare_after = cluster.router().LocateBatch(routing_pb2.LocateBatchRequest(keys=spare_keys), timeout=5,
                                               metadata=READ_MD)
    # same candidates (the 'stale' flag may flip: freshness is time, not state)
    assert [[c.node_id for c in r.candidates] for r in spare_after.results] == \
        [[c.node_id for c in r.candidates] for r in spare_before.results]
    # the same identity may take the stream over (reconnect); the older stream is then ended
    again = FakeNode(cluster.coordinator_address, md).send(hello("spare", GEOMETRY, checksum=bloom.checksum))
    assert again.recv().WhichOneof("body") in ("ack", "need_snapshot")
    # the replaced stream is refused on its next message (ABORTED: StaleStream, docs/sync-protocol.md)
    assert fake.send(sync_pb2.NodeMessage(heartbeat=sync_pb2.Heartbeat())).status() == grpc.StatusCode.ABORTED
    again.close()
    fake.close()


def test_streams_per_peer_are_limited(cluster: LocalCluster) -> None:
    """node-1 holds one stream from 127.0.0.1 and the limit is 4 (max-streams-per-peer): of six
    more streams from here, three are refused RESOURCE_EXHAUSTED naming the setting. The six send
    no Hello: a stream counts from the moment it opens (docs/security.md, "Limits")."""
    md = (("authorization", f"Bearer {SPARE_TOKEN}"),)
    wait_until(lambda: cluster.all_fresh(), 20, message="node-1 synced")
    held = [FakeNode(cluster.coordinator_address, md) for _ in range(6)]
    try:
        def ended() -> list[Any]:
            return [f for f in held if not f.replies.empty()]
        wait_until(lambda: len(ended()) >= 3, 20, interval=0.05, message="three streams past the limit refused")
        refusals = [f.recv(0) for f in ended()]
        assert len(refusals) == 3
        for refusal in refusals:
            assert isinstance(refusal, grpc.RpcError) and refusal.code() == grpc.StatusCode.RESOURCE_EXHAUSTED
            assert "max-streams-per-peer" in (refusal.details() or "")
    finally:
        for f in held:
            f.close()
    wait_until(lambda: cluster.all_fresh(), 20, message="node-1 synced")

    def accepted_again() -> bool:
        probe = FakeNode(cluster.coordinator_address, md).send(hello("spare2", GEOMETRY))
        ok = not isinstance(probe.recv(), grpc.RpcError)
        probe.close()
        return ok
    wait_until(accepted_again, 20, interval=0.1, message="streams released after close")


def test_implausible_fill_is_applied_but_flagged(cluster: LocalCluster) -> None:
    md = (("authorization", f"Bearer {SPARE_TOKEN}"),)
    ones = BloomFilter.from_bytes(GEOMETRY, b"\xff" * GEOMETRY.byte_size)
    fake = FakeNode(cluster.coordinator_address, md).send(hello("spare2", GEOMETRY, checksum=ones.checksum))
    assert fake.recv().WhichOneof("body") == "need_snapshot"
    fake.send(*snapshot_msgs(ones, key_count=3))
    assert fake.recv().WhichOneof("body") == "ack"
    status = {n.node_id: n for n in cluster.fleet_status().nodes}
    assert status["spare2"].fill == 1.0 and status["spare2"].implausible_fill
    assert not status["node-1"].implausible_fill
    text = urllib.request.urlopen(f"http://127.0.0.1:{cluster.coordinator_metrics_port}/metrics", timeout=5).read()
    assert b'shardsieve_coordinator_node_implausible_fill{node="spare2"} 1.0' in text
    assert b'shardsieve_coordinator_node_implausible_fill{node="node-1"} 0.0' in text
    fake.close()


def test_daemons_refuse_plaintext_unless_allowed(tmp_path: Path) -> None:
    import os
    import subprocess

    env = {k: v for k, v in os.environ.items() if not k.endswith("_ALLOW_PLAINTEXT")}
    port = free_port()
    for argv in (shardsieve_argv("coordinator", "--listen", f"127.0.0.1:{port}", "--log-format", "text"),
                 shardsieve_argv("node", "--id", "n1", "--listen", f"127.0.0.1:{port}", "--data",
                                 str(tmp_path / "n1"), "--log-format", "text")):
        proc = subprocess.run(argv, capture_output=True, text=True, timeout=60, env=env)
        assert proc.returncode == 1, proc.stderr
        assert "allow-plaintext" in proc.stderr and "tls-cert" in proc.stderr
