"""The image with TLS on: certificates from `shardsieve certs` mounted read-only, daemons listen
with TLS only, nodes sync over TLS, Docker's healthcheck still reports them healthy (the probe
takes the daemon's TLS settings from its environment), and a plaintext client is refused.

Reference: gRPC's TLS channel credentials (a plaintext HTTP/2 client cannot complete a call on a
TLS port: the call fails UNAVAILABLE) and Docker's container health states.
"""

from __future__ import annotations

from pathlib import Path

import grpc
import pytest

from shardsieve.testing.history import History
from shardsieve.testing.procs import wait_until
from shardsieve.v1 import admin_pb2, admin_pb2_grpc

pytestmark = [pytest.mark.container, pytest.mark.cluster, pytest.mark.timeout(180)]


def test_tls_fleet_syncs_serves_and_stays_healthy(cluster, tmp_path: Path) -> None:
    pytest.importorskip("cryptography")
    node_ids = ["node-1", "node-2"]
    cluster.enable_tls(tmp_path / "tls", node_ids, hosts=["coordinator", *node_ids, "localhost", "127.0.0.1"])
    coordinator = cluster.start_coordinator()
    nodes = [cluster.start_node(n, [coordinator.alias]) for n in node_ids]
    cluster.wait_synced(coordinator, nodes)

    history = History()
    driver = cluster.driver(coordinator, history)
    keys = [f"tidewell/lantern/{i:03d}".encode() for i in range(40)]   # invented scenario
    for key in keys:
        assert driver.write(key, b"lit:" + key), key
    for key in keys:
        outcome = driver.read(key)
        assert outcome[:2] == ("found", b"lit:" + key), outcome
    history.assert_ok()

    def health(d) -> str:  # noqa: ANN001
        d.wrapped.reload()
        return d.wrapped.attrs["State"].get("Health", {}).get("Status", "none")

    wait_until(lambda: health(nodes[0]) == "healthy", 30, interval=0.2,
               message=lambda: f"docker to report {nodes[0].name} healthy over TLS (now {health(nodes[0])})")

    with grpc.insecure_channel(coordinator.address) as plain:
        with pytest.raises(grpc.RpcError) as refused:
            admin_pb2_grpc.AdminStub(plain).FleetStatus(admin_pb2.FleetStatusRequest(), timeout=3)
    assert refused.value.code() == grpc.StatusCode.UNAVAILABLE, refused.value
