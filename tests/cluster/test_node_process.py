"""A real node process against a test coordinator speaking the real FilterSync gRPC API.

The test coordinator (shardsieve.testing.sync_peer) runs the real CoordinatorSync with a
dict of BloomFilter replicas. The reference for "the node's filter" is a Bloom filter built
from scratch over the node's keys as listed by ScanKeys, at the geometry its Stats report
(Bloom, "Space/time trade-offs in hash coding with allowable errors", CACM 1970: a key sets
its k bit positions; the set bits are exactly the union over the keys held). Checksums are
compared against shardsieve.checksum's definition (XOR of SplitMix64 of each set position;
Steele, Lea & Flood, OOPSLA 2014), recomputed from the reference's bits.
"""

from __future__ import annotations

import random
import threading
from pathlib import Path

import grpc
import pytest

from shardsieve.testing.nodes import reference_filter, scan_all_keys, start_node
from shardsieve.testing.procs import wait_until
from shardsieve.testing.sync_peer import TestCoordinator
from shardsieve.v1 import storage_pb2

pytestmark = pytest.mark.cluster


def put(stub, key: bytes, value: bytes = b"v") -> storage_pb2.WriteAck:
    return stub.Put(storage_pb2.PutRequest(key=key, value=value), timeout=10)


def replica_matches(coord: TestCoordinator, node_id: str, stub) -> bool:
    ref = reference_filter(stub)
    rep = coord.replica(node_id)
    return rep is not None and rep == ref


def assert_copy_equals_node(coord: TestCoordinator, node, covered_ack) -> None:
    """Wait until the coordinator applied the last ack, then compare bit for bit."""
    wait_until(lambda: coord.sync.covers(node.node_id, covered_ack.epoch, covered_ack.sequence), 15,
               message=lambda: f"coordinator to apply {covered_ack.epoch}/{covered_ack.sequence}; "
                               f"view {coord.view(node.node_id)}\n{node.log_tail()}")
    wait_until(lambda: replica_matches(coord, node.node_id, node.stub()), 15,
               message=lambda: "replica equal to the filter of the node's keys\n" + node.log_tail())
    ref = reference_filter(node.stub())
    rep = coord.replica(node.node_id)
    assert rep is not None
    assert rep.bits == ref.bits                      # bit for bit
    assert rep.checksum == ref.checksum              # recomputed from the reference's own bits
    view = coord.view(node.node_id)
    assert view is not None and view.checksum == ref.checksum   # the checksum the node streamed


def test_put_overwrite_delete_restart_copy_equals_node(tmp_path: Path) -> None:
    with TestCoordinator() as coord:
        node = start_node(tmp_path, "n1", coordinators=[coord.address], extra=["--capacity", "2000"])
        try:
            stub = node.stub()
            rng = random.Random(3)
            keys = [f"orchard/{i:05d}".encode() for i in range(600)]
            acks = [put(stub, k) for k in keys[:100]]
            assert all(a.created for a in acks)
            reply = stub.BatchPut(storage_pb2.BatchPutRequest(
                items=[storage_pb2.PutRequest(key=k, value=b"b") for k in keys[100:600]]), timeout=10)
            assert len(reply.acks) == 500 and all(a.created for a in reply.acks)
            # overwrite: created=False, value replaced
            over = put(stub, keys[5], b"new")
            assert over.created is False
            assert stub.Get(storage_pb2.GetRequest(key=keys[5])).value == b"new"
            # deletes: existing and missing
            doomed = rng.sample(keys, 150)
            dels = stub.BatchDelete(storage_pb2.BatchDeleteRequest(keys=doomed), timeout=10)
            assert all(a.created for a in dels.acks)
            missing = stub.Delete(storage_pb2.DeleteRequest(key=b"never/written"))
            assert missing.created is False
            last = stub.Delete(storage_pb2.DeleteRequest(key=doomed[0]))  # second delete: found nothing
            assert last.created is False
            assert set(scan_all_keys(stub)) == set(keys) - set(doomed)
            assert_copy_equals_node(coord, node, dels.acks[-1])
            epoch_before = coord.view("n1").epoch

            # restart: a new epoch, the coordinator resyncs, the copy still equals the node's filter
            assert node.stop() == 0
            node.restart()
            stub = node.stub()
            stats = stub.Stats(storage_pb2.NodeStatsRequest()).stats
            assert stats.key_count == 450 and stats.epoch == epoch_before + 1
            ack = put(stub, b"after/restart")
            assert ack.epoch == epoch_before + 1
            assert_copy_equals_node(coord, node, ack)
            assert stub.Get(storage_pb2.GetRequest(key=doomed[1])).found is False
            assert stub.Get(storage_pb2.GetRequest(key=b"after/restart")).found is True
        finally:
            node.stop()


def test_stats_count_reads_and_wasted_probes(tmp_path: Path) -> None:
    node = start_node(tmp_path, "n2")
    try:
        stub = node.stub()
        put(stub, b"plum")
        stub.BatchGet(storage_pb2.BatchGetRequest(keys=[b"plum", b"fig", b"kiwi"]))
        stub.Get(storage_pb2.GetRequest(key=b"plum"))
        s = stub.Stats(storage_pb2.NodeStatsRequest()).stats
        assert (s.reads, s.reads_missed, s.writes, s.key_count) == (4, 2, 1, 1)
        assert s.geometry.bits > 0 and 0 < s.fill < 1
        # predicted FPR is fill^k (docs/architecture.md#words; Bloom 1970)
        assert s.predicted_fpr == pytest.approx(s.fill ** s.geometry.hashes, rel=1e-9)
    finally:
        node.stop()


def test_rebuild_switches_without_missing_a_key(tmp_path: Path) -> None:
    """Rebuild under concurrent writes: at every check, every key whose ack the coordinator
    already covers is in the coordinator's replica (no false negative at any moment)."""
    with TestCoordinator() as coord:
        node = start_node(tmp_path, "n3", coordinators=[coord.address],
                          extra=["--capacity", "500", "--scan-batch", "50"])
        try:
            stub = node.stub()
            reply = stub.BatchPut(storage_pb2.BatchPutRequest(
                items=[storage_pb2.PutRequest(key=f"seed/{i:04d}".encode(), value=b"v") for i in range(800)]))
            assert_copy_equals_node(coord, node, reply.acks[-1])
            old = coord.view("n3")
            acked: list[tuple[bytes, int, int]] = []
            stop = threading.Event()
            errors: list[BaseException] = []

            def writer() -> None:
                i = 0
                wstub = node.stub()
                try:
                    while not stop.is_set():
                        key = f"live/{i:05d}".encode()
                        a = wstub.Put(storage_pb2.PutRequest(key=key, value=b"x"), timeout=10)
                        acked.append((key, a.epoch, a.sequence))
                        i += 1
                except BaseException as exc:  # noqa: BLE001
                    errors.append(exc)

            t = threading.Thread(target=writer, daemon=True)
            t.start()
            coord.request_rebuild("n3", capacity=4000, target_fpr=0.001)
            checks = 0

            def check_and_switched() -> bool:
                nonlocal checks
                with coord.lock:
                    pos = coord.sync.position("n3")
                    rep = coord.sink.replicas["n3"].copy()
                covered = [k for k, e, s in list(acked) if pos is not None and (e, s) <= pos]
                covered += [f"seed/{i:04d}".encode() for i in range(800)]
                assert all(rep.contains_batch(covered)), "a synced key is missing from the routed replica"
                checks += 1
                return pos is not None and pos[0] > old.epoch and rep.geometry.bits > old.geometry.bits

            wait_until(check_and_switched, 30, interval=0.01,
                       message=lambda: f"switch to the rebuilt filter\n{node.log_tail()}")
            stop.set()
            t.join(10)
            assert not errors, errors
            assert checks > 1
            s = stub.Stats(storage_pb2.NodeStatsRequest()).stats
            assert s.capacity == 4000 and s.epoch > old.epoch
            wait_until(lambda: stub.Stats(storage_pb2.NodeStatsRequest()).stats.rebuild_phase == "", 15,
                       message="rebuild phase back to idle")
            last = put(stub, b"after/rebuild")
            assert_copy_equals_node(coord, node, last)
        finally:
            node.stop()


def test_writes_do_not_wait_for_a_missing_coordinator(tmp_path: Path) -> None:
    """A configured coordinator that is down: the node still serves and acks writes."""
    from shardsieve.testing.procs import free_port

    dead = f"127.0.0.1:{free_port()}"
    node = start_node(tmp_path, "n4", coordinators=[dead], extra=["--reconnect-max-ms", "200"])
    try:
        stub = node.stub()
        for i in range(20):
            assert put(stub, f"k{i}".encode()).created
        assert stub.Stats(storage_pb2.NodeStatsRequest()).stats.key_count == 20
    finally:
        node.stop()


def test_unavailable_is_not_a_write(tmp_path: Path) -> None:
    """gRPC to a stopped node fails with UNAVAILABLE (a client-visible error, not a silent ack)."""
    node = start_node(tmp_path, "n5")
    address = node.address
    node.stop()
    with grpc.insecure_channel(address) as ch:
        from shardsieve.v1 import storage_pb2_grpc

        with pytest.raises(grpc.RpcError) as info:
            storage_pb2_grpc.NodeStorageStub(ch).Put(storage_pb2.PutRequest(key=b"k", value=b"v"), timeout=2)
        assert info.value.code() in (grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.DEADLINE_EXCEEDED)


def test_not_serving_until_filter_loaded_then_holds_every_stored_key(tmp_path: Path) -> None:
    """A store written before start: health answers NOT_SERVING while the filter is rebuilt
    from it (writes get UNAVAILABLE meanwhile), then SERVING with every stored key in the filter."""
    from shardsieve.node.store import SqliteStore
    from shardsieve.testing.nodes import NodeProcess
    from shardsieve.testing.procs import free_port, health_status, shardsieve_argv, start_daemon

    data = tmp_path / "n6-data"
    store = SqliteStore(data)
    preload = [(f"crate/{i:07d}".encode(), b"") for i in range(150_000)]
    store.put_many(preload)
    store.close()
    port = free_port()
    address = f"127.0.0.1:{port}"
    with TestCoordinator() as coord:
        argv = shardsieve_argv("node", "--id", "n6", "--listen", address, "--data", str(data),
                               "--coordinator", coord.address, "--capacity", "200000", "--log-format", "text")
        proc = start_daemon(argv, tmp_path / "n6.log")          # no health wait: watch it ourselves
        node = NodeProcess("n6", address, data, tmp_path / "n6.log", argv, proc=proc)
        try:
            seen: list[int | None] = []
            refused: list[grpc.StatusCode] = []

            def serving() -> bool:
                status = health_status(address, timeout=0.5)
                seen.append(status)
                if status == 2 and not refused:   # NOT_SERVING: a write must be refused
                    try:
                        put(node.stub(), b"too/early")
                    except grpc.RpcError as exc:
                        refused.append(exc.code())
                return status == 1

            wait_until(serving, 60, interval=0.01, message=lambda: "SERVING\n" + proc.log_tail())
            # grpc.health.v1: 2 = NOT_SERVING, 1 = SERVING
            assert 2 in seen, f"never saw NOT_SERVING before SERVING: {seen[:20]}"
            assert refused == [grpc.StatusCode.UNAVAILABLE]
            log_text = proc.log_text()
            assert "loading filter from store" in log_text
            assert log_text.index("filter loaded from store") < log_text.index("INFO    serving ")
            stub = node.stub()
            assert stub.Stats(storage_pb2.NodeStatsRequest()).stats.key_count == len(preload)
            coord.wait_for_node("n6", 30)
            wait_until(lambda: coord.replica("n6") is not None and coord.view("n6").epoch >= 1, 30)
            replica = coord.replica("n6")
            assert all(replica.contains_batch([k for k, _ in preload]))   # no false negative
            assert stub.Get(storage_pb2.GetRequest(key=b"too/early")).found is False
        finally:
            proc.stop()


def test_metrics_endpoint_matches_stats(tmp_path: Path) -> None:
    import urllib.request

    from shardsieve.testing.procs import free_port

    mport = free_port()
    node = start_node(tmp_path, "n7", extra=["--metrics-port", str(mport)])
    try:
        stub = node.stub()
        stub.BatchPut(storage_pb2.BatchPutRequest(
            items=[storage_pb2.PutRequest(key=f"m{i}".encode(), value=b"") for i in range(37)]))
        stub.Get(storage_pb2.GetRequest(key=b"absent"))
        text = urllib.request.urlopen(f"http://127.0.0.1:{mport}/metrics", timeout=5).read().decode()
        values = {line.split("{")[0]: float(line.rsplit(" ", 1)[1])
                  for line in text.splitlines() if line and not line.startswith("#")}
        stats = stub.Stats(storage_pb2.NodeStatsRequest()).stats
        assert values["shardsieve_node_keys"] == stats.key_count == 37
        assert values["shardsieve_node_reads_not_found_total"] == stats.reads_missed == 1
        assert values["shardsieve_node_fill_ratio"] == pytest.approx(stats.fill)
        # The rest of the node's metrics (docs/node.md, "Operations"): reads, FPR, bytes pushed, rebuilds.
        assert values["shardsieve_node_reads_total"] == stats.reads == 1
        assert values["shardsieve_node_predicted_false_positive_ratio"] == pytest.approx(stats.predicted_fpr)
        assert stats.predicted_fpr == pytest.approx(stats.fill ** stats.geometry.hashes)   # fill^k (Bloom 1970)
        assert values["shardsieve_node_sync_sent_bytes_total"] == stats.bytes_pushed
        assert values["shardsieve_node_rebuild_progress_ratio"] == 0.0
        assert 'shardsieve_node_rebuilds_total{node="n7",outcome="completed"} 0.0' in text
        assert 'shardsieve_node_rebuilds_total{node="n7",outcome="abandoned"} 0.0' in text
    finally:
        node.stop()


def test_a_stalled_coordinator_does_not_hold_back_another(tmp_path: Path) -> None:
    """Two coordinators; one swallows every message (never acks). The other still gets every
    change; once the stalled one recovers it converges too (from history or a snapshot)."""
    with TestCoordinator() as fast, TestCoordinator() as slow:
        node = start_node(tmp_path, "n8", coordinators=[fast.address, slow.address],
                          extra=["--capacity", "3000", "--history-limit", "8"])
        try:
            fast.wait_for_node("n8")
            slow.wait_for_node("n8")
            slow.drop_messages = True
            stub = node.stub()
            ack = None
            for i in range(30):   # 30 separate pushes > history-limit 8: the slow one falls off the history
                reply = stub.BatchPut(storage_pb2.BatchPutRequest(
                    items=[storage_pb2.PutRequest(key=f"p{i}/{j}".encode(), value=b"") for j in range(10)]))
                ack = reply.acks[-1]
                wait_until(lambda a=ack: fast.sync.covers("n8", a.epoch, a.sequence), 10,
                           message=lambda: "the fast coordinator keeps up\n" + node.log_tail())
            assert_copy_equals_node(fast, node, ack)
            assert not slow.sync.covers("n8", ack.epoch, ack.sequence)
            slow.drop_messages = False
            assert_copy_equals_node(slow, node, ack)
        finally:
            node.stop()


def test_heartbeats_carry_the_node_stats(tmp_path: Path) -> None:
    """Heartbeats reach the coordinator (docs/node.md, "Sync") with key count, capacity, geometry,
    fill, predicted FPR, reads, wasted probes, writes, deletes and bytes pushed; the figures
    are those of the node's own Stats and of the filter rebuilt from its keys."""
    with TestCoordinator() as coord:
        latest: list = []
        coord.on_message = lambda msg, now: (latest.append(msg.heartbeat.stats)
                                             if msg.WhichOneof("body") == "heartbeat" else None)
        node = start_node(tmp_path, "n9", coordinators=[coord.address],
                          extra=["--capacity", "3000", "--heartbeat-ms", "100"])
        try:
            stub = node.stub()
            stub.BatchPut(storage_pb2.BatchPutRequest(
                items=[storage_pb2.PutRequest(key=f"hb/{i:03d}".encode(), value=b"v") for i in range(40)]))
            stub.BatchDelete(storage_pb2.BatchDeleteRequest(keys=[f"hb/{i:03d}".encode() for i in range(5)]))
            stub.BatchGet(storage_pb2.BatchGetRequest(keys=[b"hb/010", b"hb/000", b"hb/none"]))

            def settled():
                if not latest:
                    return None
                s = latest[-1]
                return s if (s.writes, s.deletes, s.reads, s.reads_missed) == (40, 5, 3, 2) and s.bytes_pushed > 0 \
                    else None

            hb = wait_until(settled, 15, message=lambda: f"a heartbeat with the counters; last {latest[-1:]}"
                                                          f"\n{node.log_tail()}")
            own = stub.Stats(storage_pb2.NodeStatsRequest()).stats
            ref = reference_filter(stub)
            assert hb.key_count == own.key_count == 35
            assert hb.capacity == 3000
            assert hb.geometry == own.geometry and hb.geometry.bits == ref.geometry.bits
            # fill = set bits / m, predicted FPR = fill^k (docs/architecture.md#words; Bloom 1970)
            assert hb.fill == pytest.approx(ref.set_count() / ref.geometry.bits)
            assert hb.predicted_fpr == pytest.approx(hb.fill ** hb.geometry.hashes, rel=1e-9)
            assert own.bytes_pushed >= hb.bytes_pushed > 0
        finally:
            node.stop()
