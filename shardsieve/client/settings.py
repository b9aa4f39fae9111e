"""The operator tools' side of the client: where to find coordinators, and failures as one line.

Why: every operator command must resolve the coordinator addresses and token the same way
(flag > environment > config file [cli] table > default) and turn any failure into ONE line
that tells the operator what to do, with an exit code scripts can branch on (docs/cli.md).
The calls themselves are the application client's (`shardsieve.client.Client`): one client,
not two; `OperatorClient` adds the Admin calls and the translation of its exceptions.
"""

from __future__ import annotations

import dataclasses
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping, TypeVar

import grpc

from shardsieve.client import errors as cerr
from shardsieve.client.policy import READ, WRITE, RetryPolicy
from shardsieve.client.sync_client import Client
from shardsieve.config import ConfigError, load_settings, setting

DEFAULT_COORDINATOR = "127.0.0.1:7400"
CONFIG_ENV = "SHARDSIEVE_CONFIG"

# Exit codes (documented in docs/cli.md). 2 is click's own usage-error code.
EXIT_FAILURE = 1
EXIT_USAGE = 2
EXIT_UNREACHABLE = 3
EXIT_AUTH = 4
EXIT_NOT_FOUND = 5
EXIT_INVALID = 6
EXIT_UNAVAILABLE = 7

T = TypeVar("T")


class ClientError(Exception):
    """A failure already phrased for the operator: one line, plus the process exit code."""

    def __init__(self, message: str, exit_code: int = EXIT_FAILURE) -> None:
        super().__init__(message)
        self.message = " ".join(message.split())  # one line, whatever the server sent
        self.exit_code = exit_code


@dataclass(frozen=True)
class CliSettings:
    """Where the operator tools find a coordinator. File table: [cli]."""

    coordinator: str = setting(DEFAULT_COORDINATOR, "coordinator address HOST:PORT, or several, comma-separated, "
                                                    "most preferred first (failover)")
    token: str = setting("", "bearer token sent to the coordinator (empty: none)")
    timeout_s: float = setting(10.0, "deadline of each call in seconds")
    tls_ca: Path | None = setting(None, "PEM CA that signed the coordinator's certificate (TLS; env SHARDSIEVE_TLS_CA)")
    tls_cert: Path | None = setting(None, "PEM client certificate, for a coordinator requiring mutual TLS")
    tls_key: Path | None = setting(None, "PEM private key of tls-cert")

    @property
    def coordinators(self) -> tuple[str, ...]:
        return tuple(a.strip() for a in self.coordinator.split(","))

    def validate(self) -> None:
        for address in self.coordinators:
            host, sep, port = address.rpartition(":")
            if not sep or not host or not port.isdigit() or not 0 < int(port) < 65536:
                raise ConfigError(f"coordinator address {address!r} must look like HOST:PORT")
        if len(set(self.coordinators)) != len(self.coordinators):
            raise ConfigError(f"coordinator addresses repeat in {self.coordinator!r}")
        if not (self.timeout_s > 0 and self.timeout_s != float("inf")):   # NaN fails too (fuzzing found it)
            raise ConfigError(f"timeout-s must be a finite number above 0, got {self.timeout_s}")
        from shardsieve.security import TlsFiles   # TLS files: shardsieve/security.py

        TlsFiles(self.tls_cert, self.tls_key, self.tls_ca).validate()

    def credentials(self) -> grpc.ChannelCredentials | None:
        """TLS channel credentials when tls-ca or tls-cert is set, else None (plaintext)."""
        from shardsieve.security import channel_credentials

        if self.tls_ca is None and self.tls_cert is None:
            return None
        return channel_credentials(self.tls_ca, self.tls_cert, self.tls_key)


def default_config_path(environ: Mapping[str, str] | None = None) -> Path:
    environ = os.environ if environ is None else environ
    base = environ.get("XDG_CONFIG_HOME") or str(Path.home() / ".config")
    return Path(base) / "shardsieve" / "config.toml"


def resolve_settings(
    coordinator: str | None = None,
    token: str | None = None,
    config_file: str | Path | None = None,
    timeout_s: float | None = None,
    environ: Mapping[str, str] | None = None,
) -> CliSettings:
    """Layer default < config file [cli] < SHARDSIEVE_COORDINATOR/SHARDSIEVE_TOKEN < flags.

    The config file is --config, else $SHARDSIEVE_CONFIG, else ~/.config/shardsieve/config.toml
    when it exists. Raises ClientError (exit code EXIT_INVALID) on a bad value.
    """
    environ = os.environ if environ is None else environ
    path: Path | None
    if config_file is not None:
        path = Path(config_file)
    elif environ.get(CONFIG_ENV):
        path = Path(environ[CONFIG_ENV])
    else:
        candidate = default_config_path(environ)
        path = candidate if candidate.is_file() else None
    try:
        return load_settings(
            CliSettings,
            config_file=path,
            section="cli",
            environ=environ,
            overrides={"coordinator": coordinator, "token": token, "timeout_s": timeout_s},
        )
    except ConfigError as exc:
        raise ClientError(f"{exc}; fix it and retry", EXIT_INVALID) from None


def _nodes_text(error: cerr.Unavailable) -> str:
    return ", ".join(str(n) for n in error.nodes) or "a node"


def translate(error: cerr.ShardsieveError, address: str, what: str) -> ClientError:
    """The one line an operator needs for a client exception (what went wrong, what to do),
    with the exit code of docs/cli.md. Decided by the exception's type (the structured error
    detail), never by message text."""
    where = error.coordinator or address
    if isinstance(error, cerr.CoordinatorUnavailable):
        if error.code == grpc.StatusCode.DEADLINE_EXCEEDED:
            return ClientError(f"the coordinator at {where} did not answer {what} in time: check it is healthy or "
                               "raise --timeout", EXIT_UNREACHABLE)
        return ClientError(f"cannot reach the coordinator at {', '.join(error.tried) or where}: start one with "
                           "`shardsieve coordinator` or point --coordinator / SHARDSIEVE_COORDINATOR at a running one",
                           EXIT_UNREACHABLE)
    if isinstance(error, cerr.MoveUnfinished):
        return ClientError(f"{what}: the new copy is on {', '.join(error.done_on)} but node {_nodes_text(error)} "
                           "could not delete the old one; repeat the move once that node is reachable "
                           "(`shardsieve status`)", EXIT_UNAVAILABLE)
    if isinstance(error, cerr.NoNodeAvailable):
        return ClientError(f"{what} failed: no node is connected to the coordinator, nowhere to place the key; "
                           "start a node (`shardsieve status` lists them)", EXIT_UNAVAILABLE)
    if isinstance(error, cerr.Unavailable):
        done = f"; already applied on {', '.join(error.detail.done_on)}" if error.detail and error.detail.done_on \
            else ""
        return ClientError(f"{what} failed: node {_nodes_text(error)} could not be asked{done}; retry once it is "
                           "reachable (`shardsieve status` shows the nodes)", EXIT_UNAVAILABLE)
    if isinstance(error, cerr.AuthFailed):
        return ClientError(f"the coordinator at {where} refused the token ({error.message}): pass the right one with "
                           "--token or SHARDSIEVE_TOKEN", EXIT_AUTH)
    if isinstance(error, cerr.NotFound):
        return ClientError(f"{error.message}: run `shardsieve status` to list node ids", EXIT_NOT_FOUND)
    if isinstance(error, cerr.InvalidInput):
        return ClientError(f"invalid value: {error.message}; nothing was changed, fix it and retry", EXIT_INVALID)
    if isinstance(error, cerr.Refused):
        return ClientError(f"{what} refused: {error.message}", EXIT_INVALID)
    if error.code == grpc.StatusCode.UNIMPLEMENTED:
        return ClientError(f"{where} does not serve {what}: is it a shardsieve coordinator?", EXIT_UNREACHABLE)
    name = error.code.name if error.code is not None else "error"
    return ClientError(f"{what} failed at {where} ({name}): {error.message}", EXIT_FAILURE)


def translate_error(exc: grpc.RpcError, address: str, what: str) -> ClientError:
    """translate() of a raw gRPC failure (a call not made through the client, e.g. to a node)."""
    return translate(cerr.from_rpc_error(exc, address), address, what)


class OperatorClient:
    """The CLI's client: the application `Client` (failover, retries, structured errors) plus the
    Admin calls, every failure a ClientError. Each method returns the reply message."""

    def __init__(self, settings: CliSettings, client: Client | None = None) -> None:
        self.settings = settings
        self.address = settings.coordinator
        # one retry: an operator waits for the answer, and a second coordinator is tried at once
        self.client = client or Client(settings.coordinators, token=settings.token,
                                       credentials=settings.credentials(), timeout_s=settings.timeout_s,
                                       connect_timeout_s=min(settings.timeout_s, 5.0),
                                       retry=RetryPolicy(attempts=2))

    def close(self) -> None:
        self.client.close()

    def __enter__(self) -> "OperatorClient":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @property
    def metadata(self) -> tuple[tuple[str, str], ...]:
        return self.client.metadata

    def call(self, what: str, service: str, request: Any, reply_cls: type, kind: str = READ) -> Any:
        try:
            return self.client.call(service + what, request, reply_cls, kind)[0]
        except cerr.ShardsieveError as exc:
            raise translate(exc, self.address, what) from None

    def run(self, what: str, fn: Callable[[], T]) -> T:
        """fn() (an application client call), its failure as a ClientError."""
        try:
            return fn()
        except cerr.ShardsieveError as exc:
            raise translate(exc, self.address, what) from None

    # -- Admin ----------------------------------------------------------------------------------
    def _admin(self, what: str, request: Any, reply_name: str, kind: str = READ) -> Any:
        from shardsieve.client.wire import ADMIN
        from shardsieve.v1 import admin_pb2
        return self.call(what, ADMIN, request, getattr(admin_pb2, reply_name), kind)

    def fleet_status(self) -> Any:
        from shardsieve.v1 import admin_pb2
        return self._admin("FleetStatus", admin_pb2.FleetStatusRequest(), "FleetStatusReply")

    def node_detail(self, node_id: str) -> Any:
        from shardsieve.v1 import admin_pb2
        return self._admin("NodeDetail", admin_pb2.NodeDetailRequest(node_id=node_id), "NodeDetailReply")

    def rebuild(self, node_ids: list[str], *, flagged: bool = False, capacity: int = 0,
                target_fpr: float = 0.0, dry_run: bool = False) -> Any:
        from shardsieve.v1 import admin_pb2
        req = admin_pb2.RebuildCommand(node_ids=node_ids, flagged=flagged, capacity=capacity,
                                       target_fpr=target_fpr, dry_run=dry_run)
        return self._admin("Rebuild", req, "RebuildReply", WRITE)

    def get_policy(self) -> Any:
        from shardsieve.v1 import admin_pb2
        return self._admin("GetPolicy", admin_pb2.PolicyGetRequest(), "Policy")

    def set_policy(self, values: Mapping[str, str]) -> Any:
        from shardsieve.v1 import admin_pb2
        return self._admin("SetPolicy", admin_pb2.PolicySetRequest(values=dict(values)), "Policy", WRITE)

    def decisions(self, limit: int = 50) -> Any:
        from shardsieve.v1 import admin_pb2
        return self._admin("Decisions", admin_pb2.DecisionsRequest(limit=limit), "DecisionsReply")

    def unlist_node(self, node_id: str, force: bool = False) -> Any:
        from shardsieve.v1 import admin_pb2
        return self._admin("UnlistNode", admin_pb2.UnlistNodeRequest(node_id=node_id, force=force),
                           "UnlistNodeReply", WRITE)


def connect(coordinator: str | None = None, token: str | None = None, config_file: str | Path | None = None,
            timeout_s: float | None = None) -> OperatorClient:
    """Resolve settings the documented way and return an operator client (no network traffic yet)."""
    return OperatorClient(resolve_settings(coordinator, token, config_file, timeout_s))


def settings_summary(settings: CliSettings) -> dict[str, Any]:
    """Settings without the token value (for --json output and debugging)."""
    data = dataclasses.asdict(settings)
    data["token"] = "set" if settings.token else ""
    return data
