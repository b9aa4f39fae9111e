"""Token rotation without a restart: rewrite the token files, send SIGHUP, and the daemons
require the new tokens (real coordinator and node processes on loopback).

What is checked (docs/security.md, "Rotating tokens"): after the reload the old token is
refused with UNAUTHENTICATED and the new one accepted, on the coordinator's Admin and Router
and on the node's storage API; the coordinator's probes use the new node storage token (a
read through the coordinator still finds the key); a token file that became invalid is
refused as a whole and the tokens in force stay; no token value reaches a log. gRPC status
meanings are from the gRPC docs (doc/statuscodes.md).
"""

from __future__ import annotations

import signal
from pathlib import Path
from typing import Callable

import grpc
import pytest

from shardsieve.testing.procs import free_port, shardsieve_argv, start_daemon, wait_until
from shardsieve.v1 import admin_pb2, admin_pb2_grpc, routing_pb2, routing_pb2_grpc, storage_pb2, storage_pb2_grpc

pytestmark = pytest.mark.cluster

OLD = {"admin": "brinewick-admin-a1", "read": "brinewick-read-a1", "storage": "brinewick-store-a1"}
NEW = {"admin": "brinewick-admin-b2", "read": "brinewick-read-b2", "storage": "brinewick-store-b2"}


def _bearer(token: str) -> tuple[tuple[str, str], ...]:
    return (("authorization", f"Bearer {token}"),)


def _code(call: Callable[[], object]) -> grpc.StatusCode:
    try:
        call()
    except grpc.RpcError as exc:
        return exc.code()
    return grpc.StatusCode.OK


def _write_tokens(folder: Path, tokens: dict[str, str]) -> None:
    for name, token in tokens.items():
        (folder / f"{name}.token").write_text(token + "\n")


def test_sighup_rotates_every_token_file_and_a_bad_file_changes_nothing(tmp_path: Path) -> None:
    _write_tokens(tmp_path, OLD)
    coord_addr, node_addr = f"127.0.0.1:{free_port()}", f"127.0.0.1:{free_port()}"
    coord = start_daemon(shardsieve_argv(
        "coordinator", "--listen", coord_addr, "--log-format", "text", "--auto-rebuild", "false",
        "--token-file", str(tmp_path / "admin.token"), "--read-token-file", str(tmp_path / "read.token"),
        "--node-storage-token-file", str(tmp_path / "storage.token")),
        tmp_path / "coordinator.log", health_address=coord_addr)
    node = None
    try:
        node = start_daemon(shardsieve_argv(
            "node", "--id", "kelp-node-1", "--listen", node_addr, "--data", str(tmp_path / "node-data"),
            "--coordinator", coord_addr, "--capacity", "1000", "--log-format", "text",
            "--token-file", str(tmp_path / "storage.token")),
            tmp_path / "node.log", health_address=node_addr)
        with grpc.insecure_channel(coord_addr) as cch, grpc.insecure_channel(node_addr) as nch:
            admin, router = admin_pb2_grpc.AdminStub(cch), routing_pb2_grpc.RouterStub(cch)
            storage = storage_pb2_grpc.NodeStorageStub(nch)

            def status(token: str) -> grpc.StatusCode:
                return _code(lambda: admin.FleetStatus(admin_pb2.FleetStatusRequest(), timeout=5,
                                                       metadata=_bearer(token)))

            def read(token: str) -> routing_pb2.ReadReply:
                return router.Read(routing_pb2.ReadRequest(key=b"kelp/lot-7"), timeout=5, metadata=_bearer(token))

            def put(token: str, key: bytes) -> grpc.StatusCode:
                return _code(lambda: storage.Put(storage_pb2.PutRequest(key=key, value=b"dried"), timeout=5,
                                                 metadata=_bearer(token)))

            def synced() -> bool:
                reply = admin.FleetStatus(admin_pb2.FleetStatusRequest(), timeout=5, metadata=_bearer(OLD["admin"]))
                return any(n.node_id == "kelp-node-1" and n.state == "fresh" for n in reply.nodes)

            wait_until(synced, 30, message=lambda: "node synced\n" + coord.log_tail())
            router.Write(routing_pb2.WriteRequest(key=b"kelp/lot-7", value=b"kombu"), timeout=10)
            assert read(OLD["read"]).found
            assert status(NEW["admin"]) == grpc.StatusCode.UNAUTHENTICATED

            _write_tokens(tmp_path, NEW)
            coord.signal(signal.SIGHUP)
            node.signal(signal.SIGHUP)
            wait_until(lambda: status(NEW["admin"]) == grpc.StatusCode.OK, 10,
                       message=lambda: "coordinator reload\n" + coord.log_tail())
            assert status(OLD["admin"]) == grpc.StatusCode.UNAUTHENTICATED
            assert _code(lambda: read(OLD["read"])) == grpc.StatusCode.UNAUTHENTICATED
            wait_until(lambda: put(NEW["storage"], b"kelp/lot-8") == grpc.StatusCode.OK, 10,
                       message=lambda: "node reload\n" + node.log_tail())
            assert put(OLD["storage"], b"kelp/lot-9") == grpc.StatusCode.UNAUTHENTICATED
            # The coordinator probes the node with the new storage token: the key is still found.
            reply = read(NEW["read"])
            assert reply.found and reply.value == b"kombu" and reply.node_id == "kelp-node-1"

            # An invalid token file (a space inside) is refused as a whole: the new tokens stay.
            (tmp_path / "admin.token").write_text("two words\n")
            coord.signal(signal.SIGHUP)
            wait_until(lambda: "token files not reloaded" in coord.log_text(), 10, message="reload refused")
            assert status(NEW["admin"]) == grpc.StatusCode.OK and read(NEW["read"]).found
    finally:
        if node is not None:
            node.stop()
        coord.stop()
    logs = (tmp_path / "coordinator.log").read_text() + (tmp_path / "node.log").read_text()
    assert "token files reloaded" in logs
    for token in (*OLD.values(), *NEW.values()):
        assert token not in logs
