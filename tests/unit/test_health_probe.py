"""The container healthcheck probe (`shardsieve health`, `python -m shardsieve.cli.health`).

Reference: the gRPC health checking protocol (grpc.health.v1, as served by grpcio-health-checking's
HealthServicer): SERVING must give exit 0, NOT_SERVING or no answer exit 1.
"""

from __future__ import annotations

from concurrent import futures
from pathlib import Path
from typing import Iterator

import grpc
import pytest
from click.testing import CliRunner
from grpc_health.v1 import health, health_pb2, health_pb2_grpc

from shardsieve.cli.health import ProbeTls, addresses_from_env, health as health_command, probe_address, tls_from_env
from shardsieve.testing.procs import free_port


def test_wildcard_listen_hosts_are_probed_on_loopback() -> None:
    assert probe_address("0.0.0.0:7500") == "127.0.0.1:7500"
    assert probe_address("[::]:7400") == "127.0.0.1:7400"
    assert probe_address("10.1.2.3:7500") == "10.1.2.3:7500"


def test_address_comes_from_the_daemons_environment_in_order() -> None:
    assert addresses_from_env({"SHARDSIEVE_NODE_LISTEN": "0.0.0.0:7600"}) == ["127.0.0.1:7600"]
    assert addresses_from_env({"SHARDSIEVE_HEALTH_ADDRESS": "127.0.0.1:9",
                               "SHARDSIEVE_NODE_LISTEN": "0.0.0.0:7600"}) == ["127.0.0.1:9"]
    assert addresses_from_env({}) == ["127.0.0.1:7400", "127.0.0.1:7500"]


def test_tls_settings_come_from_the_daemons_environment() -> None:
    env = {"SHARDSIEVE_COORDINATOR_TLS_CA": "/c/ca.pem", "SHARDSIEVE_COORDINATOR_TLS_CERT": "/c/co.pem",
           "SHARDSIEVE_COORDINATOR_TLS_KEY": "/c/co-key.pem"}
    assert tls_from_env(env) == ProbeTls(Path("/c/ca.pem"), Path("/c/co.pem"), Path("/c/co-key.pem"))
    assert not tls_from_env({}).enabled


@pytest.fixture
def health_server() -> Iterator[tuple[str, health.HealthServicer, grpc.Server]]:
    server = grpc.server(futures.ThreadPoolExecutor(max_workers=2))
    servicer = health.HealthServicer()
    health_pb2_grpc.add_HealthServicer_to_server(servicer, server)
    address = f"127.0.0.1:{free_port()}"
    server.add_insecure_port(address)
    server.start()
    try:
        yield address, servicer, server
    finally:
        server.stop(None)


def test_exit_code_follows_the_health_status(health_server) -> None:  # noqa: ANN001
    address, servicer, _ = health_server
    runner = CliRunner()
    servicer.set("", health_pb2.HealthCheckResponse.NOT_SERVING)
    result = runner.invoke(health_command, [address])
    assert result.exit_code == 1 and "NOT_SERVING" in result.output
    servicer.set("", health_pb2.HealthCheckResponse.SERVING)
    result = runner.invoke(health_command, [address])
    assert result.exit_code == 0 and "SERVING" in result.output


def test_every_address_is_asked_and_reported(health_server) -> None:  # noqa: ANN001
    """A SERVING answer first does not hide the others: each address gets its own answer."""
    address, servicer, _ = health_server
    servicer.set("", health_pb2.HealthCheckResponse.SERVING)
    dead = f"127.0.0.1:{free_port()}"
    result = CliRunner().invoke(health_command, [address, dead, address, "--timeout", "0.5"])
    assert result.exit_code == 0, result.output
    answers = [part.strip() for part in result.output.strip().split(";")]
    assert answers == [f"{address}: SERVING", f"{dead}: unreachable (UNAVAILABLE)", f"{address}: SERVING"]


def test_nothing_listening_is_unhealthy_and_says_unreachable() -> None:
    result = CliRunner().invoke(health_command, [f"127.0.0.1:{free_port()}", "--timeout", "0.5"])
    assert result.exit_code == 1 and "unreachable" in result.output


def test_bad_address_is_a_usage_error() -> None:
    result = CliRunner().invoke(health_command, ["no-port-here"])
    assert result.exit_code == 2 and "HOST:PORT" in result.output


def test_tls_daemon_answers_a_tls_probe_only(tmp_path: Path) -> None:
    pytest.importorskip("cryptography")
    from shardsieve.cli.certs import make_dev_pki

    files = make_dev_pki(tmp_path / "pki", ["node-a"], tokens=False)
    server = grpc.server(futures.ThreadPoolExecutor(max_workers=2))
    servicer = health.HealthServicer()
    servicer.set("", health_pb2.HealthCheckResponse.SERVING)
    health_pb2_grpc.add_HealthServicer_to_server(servicer, server)
    address = f"127.0.0.1:{free_port()}"
    creds = grpc.ssl_server_credentials([(files.coordinator_key.read_bytes(), files.coordinator_cert.read_bytes())])
    server.add_secure_port(address, creds)
    server.start()
    try:
        runner = CliRunner()
        plain = runner.invoke(health_command, [address, "--timeout", "1"])
        assert plain.exit_code == 1, plain.output
        env = {"SHARDSIEVE_COORDINATOR_TLS_CA": str(files.ca),
               "SHARDSIEVE_COORDINATOR_TLS_CERT": str(files.coordinator_cert),
               "SHARDSIEVE_COORDINATOR_TLS_KEY": str(files.coordinator_key)}
        secure = runner.invoke(health_command, [address, "--timeout", "2"], env=env)
        assert secure.exit_code == 0 and "SERVING" in secure.output, secure.output
    finally:
        server.stop(None)
