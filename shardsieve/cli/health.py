"""`shardsieve health [ADDRESS ...]`: ask a daemon's gRPC health service whether it serves.

Why: a container healthcheck (and an operator's script) needs a yes/no with an exit code, not a
client library. Exit 0 when any asked address answers SERVING, 1 otherwise. With no address the
probe uses the daemon's own listen setting from the environment, so one image-wide HEALTHCHECK
fits both daemons: SHARDSIEVE_HEALTH_ADDRESS, else SHARDSIEVE_NODE_LISTEN /
SHARDSIEVE_COORDINATOR_LISTEN (a wildcard host is asked on 127.0.0.1), else the default ports
127.0.0.1:7400 (coordinator) and 127.0.0.1:7500 (node).

Also runnable as `python -m shardsieve.cli.health` (what the image's HEALTHCHECK does).
"""

from __future__ import annotations

import os
import sys
from typing import Mapping, Sequence

import click

DEFAULT_ADDRESSES = ("127.0.0.1:7400", "127.0.0.1:7500")
_ENV_ADDRESSES = ("SHARDSIEVE_HEALTH_ADDRESS", "SHARDSIEVE_NODE_LISTEN", "SHARDSIEVE_COORDINATOR_LISTEN")
_STATUS_NAMES = {0: "UNKNOWN", 1: "SERVING", 2: "NOT_SERVING", 3: "SERVICE_UNKNOWN"}


def probe_address(listen: str) -> str:
    """The address to ask for a listen address: a wildcard host (0.0.0.0, ::, empty) becomes loopback."""
    host, _, port = listen.rpartition(":")
    if host in ("", "0.0.0.0", "[::]", "::"):
        host = "127.0.0.1"
    return f"{host}:{port}"


def addresses_from_env(environ: Mapping[str, str]) -> list[str]:
    """Addresses to probe when none is given: the first environment variable set, else the defaults."""
    for name in _ENV_ADDRESSES:
        value = environ.get(name, "").strip()
        if value:
            return [probe_address(value)]
    return list(DEFAULT_ADDRESSES)


def check(addresses: Sequence[str], timeout: float) -> tuple[bool, list[str]]:
    """Ask each address; True when one answers SERVING. Returns the per-address report lines."""
    import grpc
    from grpc_health.v1 import health_pb2, health_pb2_grpc

    lines = []
    for address in addresses:
        with grpc.insecure_channel(address) as channel:
            try:
                reply = health_pb2_grpc.HealthStub(channel).Check(health_pb2.HealthCheckRequest(), timeout=timeout)
            except grpc.RpcError as exc:
                code = exc.code().name if hasattr(exc, "code") else "ERROR"  # type: ignore[union-attr]
                lines.append(f"{address}: unreachable ({code})")
                continue
        name = _STATUS_NAMES.get(int(reply.status), str(reply.status))
        lines.append(f"{address}: {name}")
        if reply.status == health_pb2.HealthCheckResponse.SERVING:
            return True, lines
    return False, lines


@click.command("health")
@click.argument("addresses", nargs=-1)
@click.option("--timeout", default=2.0, show_default=True, type=float, help="Seconds to wait for each answer.")
def health(addresses: tuple[str, ...], timeout: float) -> None:
    """Exit 0 when a daemon at ADDRESS (HOST:PORT) reports gRPC health SERVING, else 1.

    Without ADDRESS: $SHARDSIEVE_HEALTH_ADDRESS, else the daemon's listen setting from
    $SHARDSIEVE_NODE_LISTEN / $SHARDSIEVE_COORDINATOR_LISTEN, else 127.0.0.1:7400 and :7500.
    """
    if timeout <= 0:
        raise click.BadParameter(f"must be above 0, got {timeout}", param_hint="--timeout")
    for address in addresses:
        host, sep, port = address.rpartition(":")
        if not sep or not host or not port.isdigit():
            raise click.BadParameter(f"{address!r} is not HOST:PORT", param_hint="ADDRESS")
    targets = list(addresses) or addresses_from_env(os.environ)
    ok, lines = check(targets, timeout)
    click.echo("; ".join(lines))
    sys.exit(0 if ok else 1)


if __name__ == "__main__":
    health(prog_name="shardsieve health")
