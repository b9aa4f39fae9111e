"""Bad input to a real node process: each gets its specific error and changes nothing.

"Nothing changed" is checked from outside the node: its Stats (key count, fill, sequence,
writes/deletes), a Get of a known key and of the rejected key, its keys via ScanKeys, and the
test coordinator's replica compared with a filter rebuilt from those keys. Expected status
codes are the ones docs/security.md lists ("Status codes a hostile client gets": INVALID_ARGUMENT
for request limits); the limits are the
documented defaults (1 KiB keys, 1 MiB values) or the ones passed on the command line here.
"""

from __future__ import annotations


import grpc
import pytest

from shardsieve.testing.nodes import reference_filter, scan_all_keys, start_node
from shardsieve.testing.procs import wait_until
from shardsieve.testing.sync_peer import TestCoordinator
from shardsieve.v1 import filter_pb2, storage_pb2, sync_pb2

pytestmark = pytest.mark.cluster

MAX_BATCH = 5


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory):
    base = tmp_path_factory.mktemp("bad-input")
    with TestCoordinator() as coord:
        node = start_node(base, "nb", coordinators=[coord.address],
                          extra=["--max-batch", str(MAX_BATCH), "--capacity", "1000"])
        try:
            stub = node.stub()
            ack = stub.Put(storage_pb2.PutRequest(key=b"known", value=b"kept"))
            wait_until(lambda: coord.sync.covers("nb", ack.epoch, ack.sequence), 15,
                       message=lambda: "first sync\n" + node.log_tail())
            yield coord, node
        finally:
            node.stop()


def snapshot_state(coord: TestCoordinator, node) -> tuple:
    stub = node.stub()
    s = stub.Stats(storage_pb2.NodeStatsRequest()).stats
    known = stub.Get(storage_pb2.GetRequest(key=b"known"))
    return ((s.key_count, s.fill, s.writes, s.deletes, s.epoch, s.sequence, s.saturated_counters),
            (known.found, known.value),
            tuple(scan_all_keys(stub)), reference_filter(stub).checksum)


BIG_KEY = b"k" * 1025                 # default max-key-bytes is 1024
BIG_VALUE = b"v" * (1_048_576 + 1)    # default max-value-bytes is 1 MiB


@pytest.mark.parametrize("call, limit", [
    (lambda s: s.Put(storage_pb2.PutRequest(key=b"", value=b"x")), "empty key"),
    (lambda s: s.Put(storage_pb2.PutRequest(key=BIG_KEY, value=b"x")), "max-key-bytes (1024)"),
    (lambda s: s.Put(storage_pb2.PutRequest(key=b"rejected", value=BIG_VALUE)), "max-value-bytes (1048576)"),
    (lambda s: s.BatchPut(storage_pb2.BatchPutRequest(items=[
        storage_pb2.PutRequest(key=f"rejected{i}".encode(), value=b"x") for i in range(MAX_BATCH + 1)])),
     f"max-batch ({MAX_BATCH})"),
    (lambda s: s.BatchPut(storage_pb2.BatchPutRequest(items=[
        storage_pb2.PutRequest(key=b"rejected", value=b"x"), storage_pb2.PutRequest(key=b"", value=b"x")])),
     "empty key"),
    (lambda s: s.Delete(storage_pb2.DeleteRequest(key=b"")), "empty key"),
    (lambda s: s.BatchDelete(storage_pb2.BatchDeleteRequest(keys=[b"known"] * (MAX_BATCH + 1))),
     f"max-batch ({MAX_BATCH})"),
    (lambda s: s.BatchDelete(storage_pb2.BatchDeleteRequest(keys=[b"known", BIG_KEY])), "max-key-bytes (1024)"),
    (lambda s: s.Get(storage_pb2.GetRequest(key=BIG_KEY)), "max-key-bytes (1024)"),
    (lambda s: s.BatchGet(storage_pb2.BatchGetRequest(keys=[b"a"] * (MAX_BATCH + 1))), f"max-batch ({MAX_BATCH})"),
])
def test_limit_violation_is_invalid_argument_and_changes_nothing(cluster, call, limit: str) -> None:
    coord, node = cluster
    before = snapshot_state(coord, node)
    replica_before = coord.replica("nb")
    with pytest.raises(grpc.RpcError) as info:
        call(node.stub())
    assert info.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert limit in info.value.details()
    after = snapshot_state(coord, node)
    assert after == before
    assert node.stub().Get(storage_pb2.GetRequest(key=b"rejected")).found is False
    assert coord.replica("nb") == replica_before


def streams_opened(coord: TestCoordinator) -> int:
    view = coord.view("nb")
    return view.counters.streams_opened if view else 0


@pytest.mark.parametrize("message, error_name", [
    (sync_pb2.CoordinatorMessage(node_id="someone-else", ack=sync_pb2.Ack(epoch=1, sequence=0)), "WrongNodeId"),
    (sync_pb2.CoordinatorMessage(node_id="nb", ack=sync_pb2.Ack(epoch=999, sequence=0)), "UnknownEpoch"),
    (sync_pb2.CoordinatorMessage(node_id="nb", ack=sync_pb2.Ack(
        epoch=1, sequence=0, geometry=filter_pb2.Geometry(bits=1 << 12, hashes=3, scheme=1))), "GeometryMismatch"),
])
def test_foreign_coordinator_message_resets_stream_and_harms_nothing(cluster, message, error_name: str) -> None:
    coord, node = cluster
    stub = node.stub()
    epoch = stub.Stats(storage_pb2.NodeStatsRequest()).stats.epoch
    if message.ack.epoch == 1:
        message.ack.epoch = epoch        # a real epoch, so only the named field is wrong
    before = snapshot_state(coord, node)
    opened = streams_opened(coord)
    coord.send("nb", message)
    # the node ends the stream and reconnects with a fresh Hello
    wait_until(lambda: streams_opened(coord) > opened and coord.connected("nb"), 15,
               message=lambda: "the node to reset and reopen its stream\n" + node.log_tail())
    assert error_name in node.proc.log_text()
    assert snapshot_state(coord, node) == before
    ack = stub.Put(storage_pb2.PutRequest(key=f"after-{error_name}".encode(), value=b"x"))
    wait_until(lambda: coord.sync.covers("nb", ack.epoch, ack.sequence), 15,
               message=lambda: "sync to carry on after the reset\n" + node.log_tail())
    wait_until(lambda: coord.replica("nb") == reference_filter(stub), 10, message="replica equals node filter")
