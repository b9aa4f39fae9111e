"""A small gRPC client for a coordinator's Router and Admin services, used by the CLI and loadtest.

Why a wrapper: every operator command must resolve the coordinator address and token the same way
(flag > environment > config file [cli] table > default) and turn any gRPC failure into ONE line
that tells the operator what to do, with an exit code scripts can branch on.
"""

from __future__ import annotations

import dataclasses
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping, TypeVar

import grpc

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

    coordinator: str = setting(DEFAULT_COORDINATOR, "coordinator address HOST:PORT")
    token: str = setting("", "bearer token sent to the coordinator (empty: none)")
    timeout_s: float = setting(10.0, "deadline of each call in seconds")
    tls_ca: Path | None = setting(None, "PEM CA that signed the coordinator's certificate (TLS; env SHARDSIEVE_TLS_CA)")
    tls_cert: Path | None = setting(None, "PEM client certificate, for a coordinator requiring mutual TLS")
    tls_key: Path | None = setting(None, "PEM private key of tls-cert")

    def validate(self) -> None:
        host, sep, port = self.coordinator.rpartition(":")
        if not sep or not host or not port.isdigit() or not 0 < int(port) < 65536:
            raise ConfigError(f"coordinator address {self.coordinator!r} must look like HOST:PORT")
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


def _is_connect_failure(details: str) -> bool:
    text = details.lower()
    return any(s in text for s in ("failed to connect", "connection refused", "dns resolution",
                                    "name resolution", "connect failed", "socket closed",
                                    "no route to host", "unavailable to connect"))


def translate_error(exc: grpc.RpcError, address: str, what: str) -> ClientError:
    """Turn a gRPC failure into the one line an operator needs (what went wrong, what to do)."""
    code = exc.code() if hasattr(exc, "code") else None
    details = (exc.details() if hasattr(exc, "details") else "") or ""
    if code == grpc.StatusCode.UNAVAILABLE:
        if not details or _is_connect_failure(details):
            return ClientError(
                f"cannot reach the coordinator at {address}: start one with `shardsieve coordinator` "
                f"or point --coordinator / SHARDSIEVE_COORDINATOR at a running one", EXIT_UNREACHABLE)
        return ClientError(f"{what} failed: {details}; retry once the node is reachable again",
                           EXIT_UNAVAILABLE)
    if code == grpc.StatusCode.DEADLINE_EXCEEDED:
        return ClientError(f"the coordinator at {address} did not answer {what} in time: "
                           f"check it is healthy or raise --timeout", EXIT_UNREACHABLE)
    if code in (grpc.StatusCode.UNAUTHENTICATED, grpc.StatusCode.PERMISSION_DENIED):
        return ClientError(f"the coordinator at {address} refused the token ({details or code.name}): "
                           f"pass the right one with --token or SHARDSIEVE_TOKEN", EXIT_AUTH)
    if code == grpc.StatusCode.NOT_FOUND:
        return ClientError(f"{details or 'not found'}: run `shardsieve status` to list node ids",
                           EXIT_NOT_FOUND)
    if code in (grpc.StatusCode.INVALID_ARGUMENT, grpc.StatusCode.OUT_OF_RANGE):
        return ClientError(f"invalid value: {details}; nothing was changed, fix it and retry",
                           EXIT_INVALID)
    if code == grpc.StatusCode.FAILED_PRECONDITION:
        return ClientError(f"{what} refused: {details}", EXIT_INVALID)
    if code == grpc.StatusCode.UNIMPLEMENTED:
        return ClientError(f"{address} does not serve {what}: is it a shardsieve coordinator?",
                           EXIT_UNREACHABLE)
    name = code.name if code is not None else "error"
    return ClientError(f"{what} failed at {address} ({name}): {details}", EXIT_FAILURE)


class CoordinatorClient:
    """Router + Admin calls with the bearer token attached and errors translated.

    Each method returns the reply message; every failure is a ClientError.
    """

    def __init__(self, settings: CliSettings, channel: grpc.Channel | None = None) -> None:
        from shardsieve.v1 import admin_pb2_grpc, routing_pb2_grpc

        self.settings = settings
        self.address = settings.coordinator
        from shardsieve.security import make_channel

        self._channel = channel or make_channel(
            self.address, settings.credentials(), options=[("grpc.max_receive_message_length", 64 * 1024 * 1024)])
        self.router = routing_pb2_grpc.RouterStub(self._channel)
        self.admin = admin_pb2_grpc.AdminStub(self._channel)
        self._metadata: tuple[tuple[str, str], ...] = (
            (("authorization", f"Bearer {settings.token}"),) if settings.token else ())
        self._checked = False

    # -- plumbing -------------------------------------------------------------------------------
    def close(self) -> None:
        self._channel.close()

    def __enter__(self) -> "CoordinatorClient":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @property
    def metadata(self) -> tuple[tuple[str, str], ...]:
        return self._metadata

    def _ensure_reachable(self) -> None:
        """Fail fast with the 'cannot reach' line instead of a long deadline per call."""
        if self._checked:
            return
        try:
            grpc.channel_ready_future(self._channel).result(timeout=min(self.settings.timeout_s, 5.0))
        except grpc.FutureTimeoutError:
            raise ClientError(
                f"cannot reach the coordinator at {self.address}: start one with `shardsieve coordinator` "
                f"or point --coordinator / SHARDSIEVE_COORDINATOR at a running one", EXIT_UNREACHABLE) from None
        self._checked = True

    def call(self, what: str, method: Callable[..., T], request: Any, timeout_s: float | None = None) -> T:
        self._ensure_reachable()
        try:
            return method(request, timeout=timeout_s or self.settings.timeout_s, metadata=self._metadata)
        except grpc.RpcError as exc:
            raise translate_error(exc, self.address, what) from None

    # -- Admin ----------------------------------------------------------------------------------
    def fleet_status(self) -> Any:
        from shardsieve.v1 import admin_pb2
        return self.call("FleetStatus", self.admin.FleetStatus, admin_pb2.FleetStatusRequest())

    def node_detail(self, node_id: str) -> Any:
        from shardsieve.v1 import admin_pb2
        return self.call("NodeDetail", self.admin.NodeDetail, admin_pb2.NodeDetailRequest(node_id=node_id))

    def rebuild(self, node_ids: list[str], *, flagged: bool = False, capacity: int = 0,
                target_fpr: float = 0.0, dry_run: bool = False) -> Any:
        from shardsieve.v1 import admin_pb2
        req = admin_pb2.RebuildCommand(node_ids=node_ids, flagged=flagged, capacity=capacity,
                                       target_fpr=target_fpr, dry_run=dry_run)
        return self.call("Rebuild", self.admin.Rebuild, req)

    def get_policy(self) -> Any:
        from shardsieve.v1 import admin_pb2
        return self.call("GetPolicy", self.admin.GetPolicy, admin_pb2.PolicyGetRequest())

    def set_policy(self, values: Mapping[str, str]) -> Any:
        from shardsieve.v1 import admin_pb2
        return self.call("SetPolicy", self.admin.SetPolicy, admin_pb2.PolicySetRequest(values=dict(values)))

    def decisions(self, limit: int = 50) -> Any:
        from shardsieve.v1 import admin_pb2
        return self.call("Decisions", self.admin.Decisions, admin_pb2.DecisionsRequest(limit=limit))

    def unlist_node(self, node_id: str, force: bool = False) -> Any:
        from shardsieve.v1 import admin_pb2
        return self.call("UnlistNode", self.admin.UnlistNode, admin_pb2.UnlistNodeRequest(node_id=node_id, force=force))

    # -- Router ---------------------------------------------------------------------------------
    def locate(self, key: bytes) -> Any:
        from shardsieve.v1 import routing_pb2
        return self.call("Locate", self.router.Locate, routing_pb2.LocateRequest(key=key))

    def locate_batch(self, keys: list[bytes]) -> Any:
        from shardsieve.v1 import routing_pb2
        return self.call("LocateBatch", self.router.LocateBatch, routing_pb2.LocateBatchRequest(keys=keys))

    def read(self, key: bytes, deadline_ms: int = 0) -> Any:
        from shardsieve.v1 import routing_pb2
        return self.call("Read", self.router.Read, routing_pb2.ReadRequest(key=key, deadline_ms=deadline_ms))

    def write(self, key: bytes, value: bytes, node_id: str = "", move: bool = False) -> Any:
        from shardsieve.v1 import routing_pb2
        return self.call("Write", self.router.Write, routing_pb2.WriteRequest(key=key, value=value, node_id=node_id,
                                                                              move=move))

    def remove(self, key: bytes) -> Any:
        from shardsieve.v1 import routing_pb2
        return self.call("Remove", self.router.Remove, routing_pb2.RemoveRequest(key=key))


def connect(coordinator: str | None = None, token: str | None = None, config_file: str | Path | None = None,
            timeout_s: float | None = None) -> CoordinatorClient:
    """Resolve settings the documented way and return a client (no network traffic yet)."""
    return CoordinatorClient(resolve_settings(coordinator, token, config_file, timeout_s))


def settings_summary(settings: CliSettings) -> dict[str, Any]:
    """Settings without the token value (for --json output and debugging)."""
    data = dataclasses.asdict(settings)
    data["token"] = "set" if settings.token else ""
    return data
