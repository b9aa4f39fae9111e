"""Credentials, bearer tokens and peer identity for every gRPC endpoint (node and coordinator).

Why one module: the two daemons and the clients must agree on how TLS files are read, how a
plaintext listener is allowed (only when explicitly configured, always with a warning), how a
bearer token is compared (constant time, never logged) and who the peer of a sync stream is.
The daemons call into it with one or two lines; the decisions (`NodeAuthorizer`,
`StreamAdmission`, `tokens_equal`) are plain objects and functions, testable without sockets.
Both daemons serve on grpc.aio, so the interceptors here are asyncio interceptors
(`grpc.aio.ServerInterceptor`, gRPC Python's asyncio API docs).
"""

from __future__ import annotations

import errno
import hashlib
import hmac
import inspect
import ipaddress
import logging
import socket
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping, Sequence

import grpc

from shardsieve.config import ConfigError

log = logging.getLogger("shardsieve.security")

AUTH_HEADER = "authorization"
MAX_TOKEN_BYTES = 4096


class SecurityError(RuntimeError):
    """A listener or channel cannot be set up as configured; the message says what to change."""


class AddressInUse(RuntimeError):
    """The listen address cannot be bound: another process listens there, or it is not an
    address of this host. The daemons exit with their own code for it (shardsieve/daemon_runner.py)."""


# A listen address belongs to one process: without this gRPC sets SO_REUSEPORT, so a second
# daemon started on a taken port would also log "serving" and the kernel would split the
# connections between the two (socket(7), SO_REUSEPORT). Both daemons pass it to their server.
EXCLUSIVE_PORT_OPTION = ("grpc.so_reuseport", 0)


# --------------------------------------------------------------------------- TLS files


def _read_pem(path: Path, setting: str, marker: str) -> bytes:
    try:
        data = path.read_bytes()
    except (OSError, ValueError) as exc:     # ValueError: a NUL byte in the path (found by fuzzing)
        raise ConfigError(f"setting '{setting}': cannot read {str(path)!r}: "
                          f"{getattr(exc, 'strerror', None) or exc}") from None
    if marker.encode() not in data:
        raise ConfigError(f"setting '{setting}': {path} holds no PEM '{marker}' block "
                          "(make development files with `shardsieve certs --out DIR`)")
    return data


@dataclass(frozen=True)
class TlsFiles:
    """The TLS files of one process: its certificate + key (server, and client on outgoing
    channels), the CA that signs its peers, and whether peers must show a certificate."""

    cert: Path | None = None
    key: Path | None = None
    ca: Path | None = None
    client_auth: bool = False
    prefix: str = "tls-"   # how the settings are named in errors ("tls-cert", ...)

    @property
    def enabled(self) -> bool:
        return self.cert is not None or self.key is not None

    def validate(self) -> None:
        """Raise ConfigError naming the first missing or unreadable file."""
        p = self.prefix
        if (self.cert is None) != (self.key is None):
            raise ConfigError(f"settings '{p}cert' and '{p}key' go together: set both or neither")
        if self.client_auth and self.ca is None:
            raise ConfigError(f"setting '{p}client-auth' needs '{p}ca': the CA that signed the peers' certificates")
        if self.client_auth and not self.enabled:
            raise ConfigError(f"setting '{p}client-auth' needs '{p}cert' and '{p}key' (mutual TLS needs TLS)")
        if self.cert is not None:
            _read_pem(self.cert, f"{p}cert", "CERTIFICATE")
        if self.key is not None:
            _read_pem(self.key, f"{p}key", "PRIVATE KEY")
        if self.ca is not None:
            _read_pem(self.ca, f"{p}ca", "CERTIFICATE")

    def server_credentials(self) -> grpc.ServerCredentials:
        assert self.cert is not None and self.key is not None
        ca = self.ca.read_bytes() if self.ca is not None else None
        return grpc.ssl_server_credentials([(self.key.read_bytes(), self.cert.read_bytes())],
                                           root_certificates=ca, require_client_auth=self.client_auth)

    def channel_credentials(self) -> grpc.ChannelCredentials | None:
        """Credentials for outgoing calls: verify the peer against `ca` (system roots when
        unset) and present our own certificate (for peers that require mutual TLS)."""
        if not self.enabled and self.ca is None:
            return None
        return channel_credentials(self.ca, self.cert, self.key)


def channel_credentials(ca: Path | None, cert: Path | None = None,
                        key: Path | None = None) -> grpc.ChannelCredentials:
    return grpc.ssl_channel_credentials(
        root_certificates=ca.read_bytes() if ca is not None else None,
        private_key=key.read_bytes() if key is not None and cert is not None else None,
        certificate_chain=cert.read_bytes() if cert is not None and key is not None else None)


def open_port(server: grpc.aio.Server, address: str, tls: TlsFiles, allow_plaintext: bool,
              logger: logging.Logger, what: str) -> int:
    """Bind `address` with TLS when configured; plaintext only when allowed, with a warning.

    Returns the bound port. Raises SecurityError when neither is configured, AddressInUse when
    the address cannot be bound (gRPC raises RuntimeError for that: grpc.aio.Server docs).
    """
    if not tls.enabled and not allow_plaintext:
        raise SecurityError(
            f"{what} would listen in plaintext on {address}: configure tls-cert and tls-key (development "
            "files: `shardsieve certs --out DIR`), or set allow-plaintext for a trusted loopback setup")
    problem = bind_problem(address)
    if problem is not None:       # said here in one line; gRPC would also log its own error first
        raise AddressInUse(f"cannot listen on {address}: {problem} (setting listen)")
    try:
        port = (server.add_secure_port(address, tls.server_credentials()) if tls.enabled
                else server.add_insecure_port(address))
    except RuntimeError:
        raise AddressInUse(f"cannot listen on {address}: another process listens there, or it is not an address "
                           "of this host (setting listen)") from None
    if tls.enabled:
        logger.info("listening with TLS", extra={"service": what, "address": address,
                                                 "client_certificates": "required" if tls.client_auth else "not asked"})
        return port
    where = "loopback" if is_loopback(address) else "a NON-LOOPBACK address"
    logger.warning(f"listening in PLAINTEXT on {where} (allow-plaintext is set): anyone who can reach this "
                   "address can read and forge its traffic; use TLS outside a trusted loopback setup",
                   extra={"service": what, "address": address})
    return port


def bind_problem(address: str) -> str | None:
    """Why no socket can listen on HOST:PORT now (None: one can, or the name does not resolve and
    gRPC will say so). Probes every address the host resolves to, with SO_REUSEADDR as gRPC sets
    it, so a port left in TIME_WAIT by a previous run is not taken for a live listener (socket(7))."""
    host, _, port = address.rpartition(":")
    host = host.strip("[]")
    try:
        infos = socket.getaddrinfo(host or None, int(port), type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)
    except (OSError, ValueError):
        return None
    errors: list[OSError] = []
    for family, kind, proto, _, sockaddr in infos:
        with socket.socket(family, kind, proto) as probe:
            probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            try:
                probe.bind(sockaddr)
                probe.listen(1)
                return None
            except OSError as exc:
                errors.append(exc)
    if not errors:
        return None
    first = errors[0]
    if first.errno == errno.EADDRINUSE:
        return "another process listens there"
    if first.errno == errno.EADDRNOTAVAIL:
        return f"{host} is not an address of this host"
    return first.strerror or str(first)


def make_channel(address: str, credentials: grpc.ChannelCredentials | None,
                 options: Sequence[tuple[str, Any]] = ()) -> grpc.Channel:
    """A secure channel when credentials are given, else an insecure one."""
    if credentials is None:
        return grpc.insecure_channel(address, options=list(options))
    return grpc.secure_channel(address, credentials, options=list(options))


def make_aio_channel(address: str, credentials: grpc.ChannelCredentials | None,
                     options: Sequence[tuple[str, Any]] = ()) -> grpc.aio.Channel:
    """make_channel for the asyncio API (create and close it on the same event loop)."""
    if credentials is None:
        return grpc.aio.insecure_channel(address, options=list(options))
    return grpc.aio.secure_channel(address, credentials, options=list(options))


# --------------------------------------------------------------------------- tokens


def read_token(value: str, path: Path | None, setting: str = "token") -> str:
    """The token from a setting's value, else the first line of its file; '' when neither.

    Raises ConfigError for an unreadable file or a token with whitespace or control bytes
    (it travels in an HTTP/2 header)."""
    token = value
    if not token and path is not None:
        try:
            lines = path.read_text().splitlines()
        except (OSError, ValueError) as exc:     # ValueError: undecodable text or a NUL byte in the path
            raise ConfigError(f"setting '{setting}-file': cannot read {str(path)!r}: {exc}") from None
        token = lines[0].strip() if lines else ""
    if token and (len(token.encode()) > MAX_TOKEN_BYTES
                  or any(not (0x21 <= ord(c) <= 0x7E) for c in token)):
        raise ConfigError(f"setting '{setting}': a token must be 1..{MAX_TOKEN_BYTES} printable ASCII characters "
                          "without spaces (the value is not shown)")
    return token


def tokens_equal(presented: str | bytes, expected: str | bytes) -> bool:
    """Constant-time comparison (hmac.compare_digest, Python docs) of two tokens; an empty
    expected token never matches. Both sides are hashed first so the time does not depend
    on the length of the secret either."""
    p = presented.encode() if isinstance(presented, str) else presented
    e = expected.encode() if isinstance(expected, str) else expected
    if not e:
        return False
    return hmac.compare_digest(hashlib.sha256(p).digest(), hashlib.sha256(e).digest())


def bearer_token(metadata: Iterable[tuple[str, Any]] | None) -> str:
    """The token of an 'authorization: Bearer <token>' entry ('' when absent or malformed)."""
    for key, value in metadata or ():
        if key.lower() == AUTH_HEADER:
            text = value if isinstance(value, str) else bytes(value).decode("utf-8", "replace")
            scheme, _, cred = text.partition(" ")
            if scheme.lower() == "bearer":
                return cred.strip()
    return ""


def auth_metadata(token: str) -> tuple[tuple[str, str], ...]:
    return ((AUTH_HEADER, f"Bearer {token}"),) if token else ()


def parse_node_tokens(items: Sequence[str], path: Path | None) -> dict[str, str]:
    """Per-node sync tokens from NODE_ID=TOKEN items and a file of 'NODE_ID TOKEN' lines
    ('#' starts a comment). Raises ConfigError naming the line (never the token)."""
    out: dict[str, str] = {}
    entries: list[tuple[str, str, str]] = []
    for i, item in enumerate(items):
        node_id, sep, token = item.partition("=")
        entries.append((f"node-token item {i + 1}", node_id.strip() if sep else "", token.strip()))
    if path is not None:
        try:
            text = path.read_text()
        except (OSError, ValueError) as exc:
            raise ConfigError(f"setting 'node-token-file': cannot read {path}: {exc}") from None
        for n, line in enumerate(text.splitlines(), 1):
            line = line.split("#", 1)[0].strip()
            if not line:
                continue
            parts = line.split()
            entries.append((f"node-token-file {path} line {n}", parts[0] if len(parts) == 2 else "",
                            parts[1] if len(parts) == 2 else ""))
    for where, node_id, token in entries:
        if not node_id or not token:
            raise ConfigError(f"{where}: expected NODE_ID and TOKEN (NODE_ID=TOKEN on the command line, "
                              "'NODE_ID TOKEN' per line in the file)")
        read_token(token, None, "node-token")
        if node_id in out and not tokens_equal(out[node_id], token):
            raise ConfigError(f"{where}: node {node_id!r} is given two different tokens")
        out[node_id] = token
    return out


# --------------------------------------------------------------------------- peers


def peer_host(peer: str) -> str:
    """The host part of a gRPC peer string ('ipv4:10.0.0.5:4711' -> '10.0.0.5',
    'ipv6:[::1]:4711' -> '::1', 'unix:/path' -> 'unix:/path')."""
    kind, _, rest = peer.partition(":")
    if kind == "ipv4":
        return rest.rpartition(":")[0] or rest
    if kind == "ipv6":
        host = rest.rpartition(":")[0] if rest.startswith("[") else rest
        return host.strip("[]")
    return peer


def peer_address(peer: str) -> str:
    """HOST:PORT of a gRPC peer string ('ipv4:10.0.0.5:4711' -> '10.0.0.5:4711'), for logs."""
    kind, sep, rest = peer.partition(":")
    return rest if sep and kind in ("ipv4", "ipv6") else peer


def is_loopback(address: str) -> bool:
    """True when HOST of HOST:PORT is a loopback address or 'localhost'."""
    host = address.rpartition(":")[0].strip("[]")
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


@dataclass(frozen=True)
class PeerIdentity:
    """Who is at the other end of a call: network host, certificate names (when the peer
    showed a verified client certificate) and the presented bearer token (never logged)."""

    host: str
    cert_names: tuple[str, ...] = ()
    token: str = field(default="", repr=False)

    def describe(self) -> str:
        """For logs: host and certificate names, never the token."""
        cert = f" certificate {','.join(self.cert_names)}" if self.cert_names else " no client certificate"
        return f"{self.host}{cert}{' with a token' if self.token else ''}"


def _names(auth: Mapping[str, Sequence[bytes]], key: str) -> list[str]:
    return [v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v) for v in auth.get(key, ())]


def peer_identity(context: grpc.aio.ServicerContext) -> PeerIdentity:
    """Read the identity of a call's peer from its gRPC context (call from the handler)."""
    auth = context.auth_context() or {}
    names = _names(auth, "x509_common_name")
    return PeerIdentity(host=peer_host(context.peer() or ""), cert_names=tuple(names),
                        token=bearer_token(context.invocation_metadata()))


class NodeAuthorizer:
    """Decides whether a sync stream may speak for a node id (no I/O).

    Modes: "certificate" (mutual TLS: the client certificate's common name must equal the
    node id), "token" (the node id's configured token must be presented), "open" (nobody is
    checked; only for trusted networks). `identity_key` says which streams count as the same
    identity, for reconnect takeover: certificate name, token digest, or peer host.
    """

    def __init__(self, mode: str, node_tokens: Mapping[str, str] | None = None) -> None:
        if mode not in ("certificate", "token", "open"):
            raise ValueError(f"unknown node authentication mode {mode!r}")
        if mode == "token" and not node_tokens:
            raise ValueError("token mode needs at least one node token")
        self.mode = mode
        self._tokens = dict(node_tokens or {})

    def set_tokens(self, node_tokens: Mapping[str, str]) -> None:
        """Replace the node tokens (rotation; streams already open stay open). The mode stays:
        token mode refuses an empty set, since no node could connect any more."""
        if self.mode == "token" and not node_tokens:
            raise ValueError("token mode needs at least one node token")
        self._tokens = dict(node_tokens)

    def refusal(self, node_id: str, who: PeerIdentity) -> str | None:
        """None when `who` may open node_id's stream, else the reason (safe to log and send)."""
        if self.mode == "certificate":
            if not who.cert_names:
                return f"node {node_id!r}: no verified client certificate (mutual TLS is required)"
            if node_id not in who.cert_names:
                return (f"node {node_id!r}: the client certificate is issued to "
                        f"{', '.join(repr(n) for n in who.cert_names)}, not to this node id")
            return None
        if self.mode == "token":
            expected = self._tokens.get(node_id)
            if expected is None:
                tokens_equal(who.token, "\x00")   # same work as a known id
                return f"node {node_id!r} has no sync token configured at this coordinator"
            if not who.token:
                return f"node {node_id!r}: no 'authorization: Bearer' token on the sync stream"
            if not tokens_equal(who.token, expected):
                return f"node {node_id!r}: the sync token is wrong"
            return None
        return None

    def identity_key(self, who: PeerIdentity) -> str:
        if self.mode == "certificate":
            return "cert:" + ",".join(sorted(who.cert_names))
        if self.mode == "token":
            return "token:" + hashlib.sha256(who.token.encode()).hexdigest()
        return "host:" + who.host


class StreamAdmission:
    """Which sync streams may open (no I/O; the coordinator's event loop is its only caller).

    Three caps, each refused stream told which one and its setting: all open streams
    (`max_streams`), streams that have not completed their Hello (`max_pending`: a peer that
    opens streams and never speaks holds no more than that), and open streams per peer host
    (`max_per_peer`). A stream counts as pending from `admit` until `hello_done` or `release`.
    """

    def __init__(self, *, max_streams: int = 1 << 30, max_pending: int = 1 << 30, max_per_peer: int = 1 << 30) -> None:
        self.max_streams = max_streams
        self.max_pending = max_pending
        self.max_per_peer = max_per_peer
        self.open = 0
        self.pending = 0
        self.refused: dict[str, int] = {}     # setting name -> streams refused by it
        self.hello_timeouts = 0               # streams closed for want of a Hello in time
        self._per_host: dict[str, int] = {}

    def admit(self, host: str) -> str | None:
        """Count a new stream from `host` as open and pending, or say why it is refused."""
        if self.open >= self.max_streams:
            return self._refuse("max-sync-streams", f"this coordinator has {self.open} sync streams open, its "
                                                    "limit (setting max-sync-streams)")
        if self.pending >= self.max_pending:
            return self._refuse("max-pending-streams", f"{self.pending} sync streams have not sent their Hello "
                                                       "yet, the limit (setting max-pending-streams); retry shortly")
        if self._per_host.get(host, 0) >= self.max_per_peer:
            return self._refuse("max-streams-per-peer", f"{host} already has {self.max_per_peer} sync streams "
                                                        "open here (setting max-streams-per-peer)")
        self.open += 1
        self.pending += 1
        self._per_host[host] = self._per_host.get(host, 0) + 1
        return None

    def _refuse(self, setting: str, reason: str) -> str:
        self.refused[setting] = self.refused.get(setting, 0) + 1
        return reason

    def hello_done(self) -> None:
        """An admitted stream completed its Hello (and authentication): no longer pending."""
        self.pending -= 1

    def hello_timed_out(self) -> None:
        """An admitted stream is being closed: no Hello in time (it is released when it ends)."""
        self.hello_timeouts += 1

    def release(self, host: str, pending: bool) -> None:
        """An admitted stream ended (`pending`: before completing its Hello)."""
        self.open -= 1
        if pending:
            self.pending -= 1
        n = self._per_host.get(host, 0) - 1
        if n <= 0:
            self._per_host.pop(host, None)
        else:
            self._per_host[host] = n

    def count(self, host: str) -> int:
        return self._per_host.get(host, 0)


# --------------------------------------------------------------------------- token interceptor


def _denying_handler(handler: grpc.RpcMethodHandler, code: grpc.StatusCode, message: str) -> grpc.RpcMethodHandler:
    async def deny(request: Any, context: grpc.aio.ServicerContext) -> Any:
        await context.abort(code, message)

    kw = {"request_deserializer": handler.request_deserializer, "response_serializer": handler.response_serializer}
    if handler.unary_unary is not None:
        return grpc.unary_unary_rpc_method_handler(deny, **kw)
    if handler.unary_stream is not None:
        return grpc.unary_stream_rpc_method_handler(deny, **kw)
    if handler.stream_unary is not None:
        return grpc.stream_unary_rpc_method_handler(deny, **kw)
    return grpc.stream_stream_rpc_method_handler(deny, **kw)


class TokenGuard(grpc.aio.ServerInterceptor):
    """Requires a bearer token on the methods it names; others pass untouched.

    `rules` maps a full method name ("/shardsieve.v1.Router/Write") or a service prefix
    ("/shardsieve.v1.Admin/") to the token it needs. A refused call ends UNAUTHENTICATED;
    the token is compared in constant time and never logged.
    """

    def __init__(self, rules: Mapping[str, str], on_refused: Callable[[str], None] | None = None) -> None:
        self._rules = {k: v for k, v in rules.items() if v}
        self._on_refused = on_refused

    def update(self, rules: Mapping[str, str]) -> None:
        """Replace every rule at once (token rotation): a call is checked against the old rules
        or the new ones, never a mix."""
        self._rules = {k: v for k, v in rules.items() if v}

    @property
    def active(self) -> bool:
        """False when no method needs a token."""
        return bool(self._rules)

    def required(self, method: str) -> str:
        token = self._rules.get(method)
        if token is None:
            service = method.rpartition("/")[0] + "/"
            token = self._rules.get(service, "")
        return token

    async def intercept_service(self, continuation: Callable[[Any], Any], handler_call_details: Any) -> Any:
        handler = await continuation(handler_call_details)
        method = handler_call_details.method
        expected = self.required(method)
        if not expected or handler is None:
            return handler
        if tokens_equal(bearer_token(handler_call_details.invocation_metadata), expected):
            return handler
        if self._on_refused is not None:
            self._on_refused(method)
        log.warning("call refused: missing or wrong bearer token", extra={"method": method})
        return _denying_handler(handler, grpc.StatusCode.UNAUTHENTICATED,
                                f"{method} requires 'authorization: Bearer <token>' metadata; the token was missing "
                                "or wrong")


class Undecodable:
    """Stands for a request whose bytes are not a valid message (see DecodeGuard)."""

    def __init__(self, error: str) -> None:
        self.error = error

    def WhichOneof(self, _name: str) -> None:  # noqa: N802 - looks like a message with no body
        return None


def _safe(deserializer: Callable[[bytes], Any] | None) -> Callable[[bytes], Any] | None:
    if deserializer is None:
        return None

    def decode(data: bytes) -> Any:
        try:
            return deserializer(data)
        except Exception as exc:  # noqa: BLE001 - any decode failure is the peer's fault
            return Undecodable(f"{type(exc).__name__}: {exc}")
    return decode


class DecodeGuard(grpc.aio.ServerInterceptor):
    """Undecodable request bytes end a unary call INVALID_ARGUMENT (gRPC's own answer would be
    INTERNAL, which reads like a server bug); streaming handlers receive an `Undecodable`
    in place of the message and refuse it themselves."""

    def __init__(self) -> None:
        self._wrapped: dict[int, tuple[Any, Any]] = {}     # id(handler) -> (handler, wrapped): handlers are static

    async def intercept_service(self, continuation: Callable[[Any], Any], handler_call_details: Any) -> Any:
        handler = await continuation(handler_call_details)
        if handler is None or handler.request_deserializer is None:
            return handler
        cached = self._wrapped.get(id(handler))
        if cached is not None and cached[0] is handler:
            return cached[1]
        wrapped = self._wrap(handler, handler_call_details.method)
        self._wrapped[id(handler)] = (handler, wrapped)
        return wrapped

    @staticmethod
    def _wrap(handler: grpc.RpcMethodHandler, method: str) -> grpc.RpcMethodHandler:

        async def refuse_undecodable(request: Any, context: grpc.aio.ServicerContext) -> None:
            if isinstance(request, Undecodable):
                await context.abort(grpc.StatusCode.INVALID_ARGUMENT,
                                    f"the request to {method} is not a valid message ({request.error[:200]})")

        def unary(behavior: Callable[..., Any]) -> Callable[..., Any]:
            async def run(request: Any, context: grpc.aio.ServicerContext) -> Any:
                await refuse_undecodable(request, context)
                return await behavior(request, context)
            return run

        def unary_stream(behavior: Callable[..., Any]) -> Callable[..., Any]:
            async def run(request: Any, context: grpc.aio.ServicerContext) -> None:
                await refuse_undecodable(request, context)
                replies = behavior(request, context)
                if inspect.isasyncgen(replies):      # an async generator handler: write what it yields
                    async for reply in replies:
                        await context.write(reply)
                else:                                # a coroutine handler writes with context.write itself
                    await replies
            return run

        kw = {"request_deserializer": _safe(handler.request_deserializer),
              "response_serializer": handler.response_serializer}
        if handler.unary_unary is not None:
            return grpc.unary_unary_rpc_method_handler(unary(handler.unary_unary), **kw)
        if handler.unary_stream is not None:
            return grpc.unary_stream_rpc_method_handler(unary_stream(handler.unary_stream), **kw)
        if handler.stream_unary is not None:
            return grpc.stream_unary_rpc_method_handler(handler.stream_unary, **kw)
        return grpc.stream_stream_rpc_method_handler(handler.stream_stream, **kw)
