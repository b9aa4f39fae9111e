"""kill -9 of a node right after acknowledged writes loses none of them.

Writers keep putting while the node is killed with SIGKILL (no shutdown code runs); every
write whose ack the client received must be readable after the restart, and the restarted
node's filter (as streamed to a test coordinator running the real CoordinatorSync) must hold
every one of them. Both sync levels promise survival of a process kill (SQLite docs,
"PRAGMA synchronous": in WAL mode NORMAL and FULL both keep committed transactions across an
application crash; only power loss separates them).
"""

from __future__ import annotations

import threading
from pathlib import Path

import grpc
import pytest

from shardsieve.testing.nodes import reference_filter, start_node
from shardsieve.testing.procs import wait_until
from shardsieve.testing.sync_peer import TestCoordinator
from shardsieve.v1 import storage_pb2

pytestmark = pytest.mark.cluster

WRITERS = 4


@pytest.mark.parametrize("sync_level", ["full", "normal"])
def test_kill9_after_acks_loses_nothing(tmp_path: Path, sync_level: str) -> None:
    with TestCoordinator() as coord:
        node = start_node(tmp_path, "nd", coordinators=[coord.address],
                          extra=["--sync-level", sync_level, "--capacity", "5000"])
        acked: list[list[bytes]] = [[] for _ in range(WRITERS)]
        deleted_acked: list[bytes] = []
        enough = threading.Event()
        total_lock = threading.Lock()
        total = [0]

        def writer(w: int) -> None:
            with grpc.insecure_channel(node.address) as ch:
                from shardsieve.v1 import storage_pb2_grpc

                stub = storage_pb2_grpc.NodeStorageStub(ch)
                i = 0
                while True:
                    try:
                        if i % 3 == 2:
                            keys = [f"w{w}/b{i}/{j}".encode() for j in range(5)]
                            stub.BatchPut(storage_pb2.BatchPutRequest(
                                items=[storage_pb2.PutRequest(key=k, value=k) for k in keys]), timeout=5)
                        else:
                            keys = [f"w{w}/s{i}".encode()]
                            stub.Put(storage_pb2.PutRequest(key=keys[0], value=keys[0]), timeout=5)
                    except grpc.RpcError:
                        return   # the node is gone: this write was not acknowledged
                    acked[w].extend(keys)
                    if w == 0 and i % 10 == 5:
                        victim = acked[0].pop(0)
                        try:
                            stub.Delete(storage_pb2.DeleteRequest(key=victim), timeout=5)
                            deleted_acked.append(victim)
                        except grpc.RpcError:
                            return   # unknown outcome: the victim is checked neither way
                    with total_lock:
                        total[0] += len(keys)
                        if total[0] >= 300:
                            enough.set()
                    i += 1

        threads = [threading.Thread(target=writer, args=(w,), daemon=True) for w in range(WRITERS)]
        for t in threads:
            t.start()
        assert enough.wait(60), node.log_tail()
        assert node.kill() == -9           # SIGKILL while writes are in flight
        for t in threads:
            t.join(10)
        keys = [k for lst in acked for k in lst]
        assert len(keys) >= 250   # 300 acked writes minus the deletes of some of them

        node.restart()
        stub = node.stub()
        found = []
        for start in range(0, len(keys), 500):
            reply = stub.BatchGet(storage_pb2.BatchGetRequest(keys=keys[start:start + 500]))
            found.extend(item.found and item.value == k for item, k in zip(reply.items, keys[start:start + 500]))
        lost = [k for k, ok in zip(keys, found) if not ok]
        assert not lost, f"{len(lost)} acknowledged writes lost, e.g. {lost[:5]}"
        gone = stub.BatchGet(storage_pb2.BatchGetRequest(keys=deleted_acked[:500]))
        assert not any(item.found for item in gone.items), "an acknowledged delete came back"

        # the restarted node's filter holds them: its streamed copy contains every acked key
        stats = stub.Stats(storage_pb2.NodeStatsRequest()).stats
        assert stats.key_count >= len(keys)
        wait_until(lambda: (coord.view("nd").epoch == stats.epoch and coord.replica("nd") is not None
                            and coord.replica("nd") == reference_filter(stub)), 20,
                   message=lambda: "coordinator copy of the restarted node\n" + node.log_tail())
        replica = coord.replica("nd")
        assert replica is not None and all(replica.contains_batch(keys))
        node.stop()
