"""`shardsieve health [ADDRESS ...]`: ask a daemon's gRPC health service whether it serves.

Why: a container healthcheck (and an operator's script) needs a yes/no with an exit code, not a
client library. Exit 0 when any asked address answers SERVING, 1 otherwise. With no address the
probe uses the daemon's own listen setting from the environment, so one image-wide HEALTHCHECK
fits both daemons: SHARDSIEVE_HEALTH_ADDRESS, else SHARDSIEVE_NODE_LISTEN /
SHARDSIEVE_COORDINATOR_LISTEN (a wildcard host is asked on 127.0.0.1), else the default ports
127.0.0.1:7400 (coordinator) and 127.0.0.1:7500 (node).

TLS: with --ca (and --cert/--key for daemons that require client certificates) the probe
speaks TLS. Without flags it takes them from the daemon's own settings in the environment
(SHARDSIEVE_NODE_TLS_CA/_CERT/_KEY, else SHARDSIEVE_COORDINATOR_TLS_*), so a TLS daemon in a
container stays probe-able; the daemon's own certificate serves as the client certificate.
--server-name (env SHARDSIEVE_HEALTH_SERVER_NAME) names the host the certificate must be for
when it does not list 127.0.0.1.

Also runnable as `python -m shardsieve.cli.health` (what the image's HEALTHCHECK does).
"""

from __future__ import annotations

import os
import sys
from dataclasses import dataclass
from pathlib import Path
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


@dataclass(frozen=True)
class ProbeTls:
    """TLS material of the probe: CA to verify the daemon, optional client certificate + key."""

    ca: Path | None = None
    cert: Path | None = None
    key: Path | None = None
    server_name: str = ""

    @property
    def enabled(self) -> bool:
        return self.ca is not None or self.cert is not None

    def credentials(self):  # noqa: ANN201 - grpc.ChannelCredentials
        import grpc

        def read(path: Path | None) -> bytes | None:
            return path.read_bytes() if path is not None else None

        return grpc.ssl_channel_credentials(root_certificates=read(self.ca), private_key=read(self.key),
                                            certificate_chain=read(self.cert))


def tls_from_env(environ: Mapping[str, str]) -> ProbeTls:
    """The daemon's own TLS settings (node first, then coordinator); empty when it runs plaintext."""
    server_name = environ.get("SHARDSIEVE_HEALTH_SERVER_NAME", "")
    for prefix in ("SHARDSIEVE_NODE_TLS_", "SHARDSIEVE_COORDINATOR_TLS_"):
        cert, key, ca = (environ.get(prefix + name, "").strip() for name in ("CERT", "KEY", "CA"))
        if cert or ca:
            return ProbeTls(Path(ca) if ca else None, Path(cert) if cert and key else None,
                            Path(key) if cert and key else None, server_name)
    return ProbeTls(server_name=server_name)


def _channel(address: str, tls: ProbeTls):  # noqa: ANN202 - grpc.Channel
    import grpc

    if not tls.enabled:
        return grpc.insecure_channel(address)
    options = [("grpc.ssl_target_name_override", tls.server_name)] if tls.server_name else []
    return grpc.secure_channel(address, tls.credentials(), options=options)


def check(addresses: Sequence[str], timeout: float, tls: ProbeTls | None = None) -> tuple[bool, list[str]]:
    """Ask every address (each gets its own answer line, in order); True when at least one
    answers SERVING."""
    import grpc
    from grpc_health.v1 import health_pb2, health_pb2_grpc

    tls = tls or ProbeTls()
    lines = []
    serving = False
    for address in addresses:
        with _channel(address, tls) as channel:
            try:
                reply = health_pb2_grpc.HealthStub(channel).Check(health_pb2.HealthCheckRequest(), timeout=timeout)
            except grpc.RpcError as exc:
                code = exc.code().name if hasattr(exc, "code") else "ERROR"  # type: ignore[union-attr]
                lines.append(f"{address}: unreachable ({code})")
                continue
        name = _STATUS_NAMES.get(int(reply.status), str(reply.status))
        lines.append(f"{address}: {name}")
        serving = serving or reply.status == health_pb2.HealthCheckResponse.SERVING
    return serving, lines


def _utf8(text: str) -> bool:
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:   # bytes that were not UTF-8 on the command line (PEP 383)
        return False
    return True


_FILE = click.Path(exists=True, dir_okay=False, path_type=Path)


@click.command("health")
@click.argument("addresses", nargs=-1, metavar="[ADDRESS]...")
@click.option("--timeout", default=2.0, show_default=True, type=float, help="Seconds to wait for each answer.")
@click.option("--ca", type=_FILE, default=None, help="PEM CA that signed the daemon's certificate (speaks TLS).")
@click.option("--cert", type=_FILE, default=None, help="PEM client certificate, for daemons requiring one.")
@click.option("--key", type=_FILE, default=None, help="PEM private key of --cert.")
@click.option("--server-name", default=None, help="Host name the daemon's certificate must be for, when it does not list the address asked "
                   "(env SHARDSIEVE_HEALTH_SERVER_NAME).")
def health(addresses: tuple[str, ...], timeout: float, ca: Path | None, cert: Path | None, key: Path | None,
           server_name: str | None) -> None:
    """Ask daemons' gRPC health service: exit 0 when any ADDRESS (HOST:PORT) answers SERVING, else 1.

    Asks every address and prints one line with each address and its answer (SERVING,
    NOT_SERVING, unreachable).
    Without ADDRESS: $SHARDSIEVE_HEALTH_ADDRESS, else the daemon's listen setting from
    $SHARDSIEVE_NODE_LISTEN / $SHARDSIEVE_COORDINATOR_LISTEN, else 127.0.0.1:7400 and :7500.
    Without --ca/--cert the TLS files come from $SHARDSIEVE_NODE_TLS_* or
    $SHARDSIEVE_COORDINATOR_TLS_* (plaintext when neither is set).
    """
    if timeout <= 0:
        raise click.BadParameter(f"must be above 0, got {timeout}", param_hint="--timeout")
    for address in addresses:
        host, sep, port = address.rpartition(":")
        if not sep or not host or not port.isdigit() or not address.isprintable() or not _utf8(address):
            raise click.BadParameter(f"{address!r} is not HOST:PORT", param_hint="ADDRESS")
    if (cert is None) != (key is None):
        raise click.UsageError("--cert and --key go together: give both or neither")
    if ca or cert:
        tls = ProbeTls(ca, cert, key, server_name or "")
    else:
        tls = tls_from_env(os.environ)
        if server_name:
            tls = ProbeTls(tls.ca, tls.cert, tls.key, server_name)
    targets = list(addresses) or addresses_from_env(os.environ)
    ok, lines = check(targets, timeout, tls)
    click.echo("; ".join(lines))
    sys.exit(0 if ok else 1)


if __name__ == "__main__":
    health(prog_name="shardsieve health")
