"""Node ids outside the alphabet, against real processes on loopback (docs/node.md, "Node ids").

A node process started with such an id stops at once with exit 2 and one line naming the rule
(docs/node.md, "Settings": an invalid value stops the node with one line); a Hello carrying a
look-alike of a connected node's id, sent over a raw FilterSync stream to a real coordinator,
ends with INVALID_ARGUMENT (docs/security.md status codes; gRPC's meaning of the code:
doc/statuscodes.md) and leaves the coordinator's fleet as it was.
"""

from __future__ import annotations

import os
import subprocess
from pathlib import Path

import grpc
import pytest

from shardsieve.geometry import Geometry
from shardsieve.limits import NODE_ID_RULE
from shardsieve.testing.nodes import start_node
from shardsieve.testing.procs import free_port, shardsieve_argv, start_daemon, wait_until
from shardsieve.v1 import admin_pb2, admin_pb2_grpc, sync_pb2, sync_pb2_grpc

pytestmark = pytest.mark.cluster

GOOD = "kelp-shed-1"
LOOK_ALIKE = "kelp-sh\u0435d-1"      # Cyrillic small letter ie (U+0435) in place of the Latin e


@pytest.mark.parametrize("node_id", [LOOK_ALIKE, "..", "kelp/shed-1"])
def test_a_node_process_with_an_id_outside_the_alphabet_exits_2_with_one_line(tmp_path: Path, node_id: str) -> None:
    data = tmp_path / "data"
    env = {**os.environ, "SHARDSIEVE_CONFIG": ""}
    done = subprocess.run(shardsieve_argv("node", "--id", node_id, "--listen", f"127.0.0.1:{free_port()}",
                                          "--data", str(data), "--allow-plaintext", "true"),
                          capture_output=True, text=True, env=env, timeout=60)
    assert done.returncode == 2, (done.stdout, done.stderr)
    lines = [line for line in done.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "'id'" in lines[0] and NODE_ID_RULE in lines[0], done.stderr
    assert not data.exists()                     # refused before anything was created


def fleet(channel: grpc.Channel) -> list[tuple[str, int, int, int, bool]]:
    """Every node the coordinator lists: id, replica position and checksum, connected."""
    status = admin_pb2_grpc.AdminStub(channel).FleetStatus(admin_pb2.FleetStatusRequest(), timeout=10)
    return sorted((n.node_id, n.epoch, n.sequence, n.checksum, n.connected) for n in status.nodes)


def synced(channel: grpc.Channel) -> list[tuple[str, int, int, int, bool]]:
    status = admin_pb2_grpc.AdminStub(channel).FleetStatus(admin_pb2.FleetStatusRequest(), timeout=10)
    return fleet(channel) if [n.state for n in status.nodes] == ["fresh"] else []


def test_a_look_alike_id_in_a_hello_is_invalid_argument_and_changes_nothing(tmp_path: Path) -> None:
    coord = f"127.0.0.1:{free_port()}"
    coordinator = start_daemon(shardsieve_argv("coordinator", "--listen", coord, "--allow-plaintext", "true",
                                               "--log-format", "text"),
                               tmp_path / "coordinator.log", health_address=coord)
    node = start_node(tmp_path, GOOD, coordinators=[coord], extra=["--allow-plaintext", "true", "--capacity", "500"])
    channel = grpc.insecure_channel(coord)
    try:
        before = wait_until(lambda: synced(channel), 30, message="the real node synced with the coordinator")
        assert [n[0] for n in before] == [GOOD]
        hello = sync_pb2.Hello(node_id=LOOK_ALIKE, storage_address="127.0.0.1:9",
                               geometry=Geometry(bits=1024, hashes=3).to_proto(), epoch=1, sequence=0,
                               capacity=100, target_fpr=0.01, push_interval_ms=50, protocol_version=1)
        stream = sync_pb2_grpc.FilterSyncStub(channel).Stream(iter([sync_pb2.NodeMessage(hello=hello)]), timeout=10)
        with pytest.raises(grpc.RpcError) as refused:
            list(stream)
        assert refused.value.code() == grpc.StatusCode.INVALID_ARGUMENT
        assert "U+0435" in refused.value.details() and NODE_ID_RULE in refused.value.details()
        assert fleet(channel) == before              # only the real node, at the same position
        assert coordinator.alive() and node.proc is not None and node.proc.alive()
    finally:
        channel.close()
        node.stop()
        coordinator.stop()
    assert "Traceback" not in (tmp_path / "coordinator.log").read_text()
