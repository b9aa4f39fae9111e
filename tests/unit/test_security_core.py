"""shardsieve.security and `shardsieve certs`: tokens, node identity, TLS files, interceptors.

The TLS checks run a real in-process gRPC server (grpc.aio, as the daemons serve) on loopback
with certificates made by `make_dev_pki`; the outside reference is gRPC's own TLS stack
(BoringSSL) deciding the handshake, and the `cryptography` package reading the issued
certificates back.
"""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any, Iterator, Sequence

import grpc
import pytest
from click.testing import CliRunner
from cryptography import x509
from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID
from grpc_health.v1 import health_pb2, health_pb2_grpc
from grpc_health.v1.health import aio as health_aio

from shardsieve.cli.certs import make_dev_pki
from shardsieve.cli.main import cli
from shardsieve.config import ConfigError
from shardsieve.security import (
    EXCLUSIVE_PORT_OPTION,
    AddressInUse,
    DecodeGuard,
    NodeAuthorizer,
    PeerIdentity,
    SecurityError,
    StreamAdmission,
    TlsFiles,
    TokenGuard,
    bearer_token,
    channel_credentials,
    is_loopback,
    open_port,
    parse_node_tokens,
    peer_host,
    read_token,
    tokens_equal,
)
from shardsieve.testing.event_loop import LoopThread


@pytest.fixture(scope="module")
def loop() -> Iterator[LoopThread]:
    with LoopThread("security-tests") as running:
        yield running


def serve(loop: LoopThread, servicer: Any, *, interceptors: Sequence[Any] = (), tls: TlsFiles | None = None,
          address: str = "127.0.0.1:0") -> tuple[grpc.aio.Server, int]:
    """A started grpc.aio server on `loop` with the health servicer given, and its port."""
    async def start() -> tuple[grpc.aio.Server, int]:
        server = grpc.aio.server(interceptors=list(interceptors), options=[EXCLUSIVE_PORT_OPTION])
        health_pb2_grpc.add_HealthServicer_to_server(servicer, server)
        port = open_port(server, address, tls or TlsFiles(), tls is None, logging.getLogger("test"), "test")
        await server.start()
        return server, port
    return loop.run(start())


@pytest.fixture(scope="module")
def pki(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("pki")
    make_dev_pki(out, ["node-1", "node-2"])
    return out


@pytest.fixture(scope="module")
def other_pki(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("other-pki")
    make_dev_pki(out, ["node-1"])
    return out


# --------------------------------------------------------------------------- tokens


def test_tokens_equal_only_for_identical_nonempty_tokens() -> None:
    assert tokens_equal("s3cret-token", "s3cret-token")
    assert not tokens_equal("s3cret-token", "s3cret-tokeN")
    assert not tokens_equal("s3cret", "s3cret-token")        # a prefix is not the token
    assert not tokens_equal("", "")                          # no configured token never matches


def test_bearer_token_reads_only_the_bearer_scheme() -> None:
    assert bearer_token([("authorization", "Bearer abc")]) == "abc"
    assert bearer_token([("Authorization", "bearer  abc ")]) == "abc"
    assert bearer_token([("authorization", "Basic abc")]) == ""
    assert bearer_token([("x-other", "Bearer abc")]) == ""
    assert bearer_token(None) == ""


def test_read_token_from_file_and_refuses_spaces(tmp_path: Path) -> None:
    f = tmp_path / "t"
    f.write_text("from-file\nsecond line ignored\n")
    assert read_token("", f) == "from-file"
    assert read_token("flag-wins", f) == "flag-wins"
    with pytest.raises(ConfigError, match="printable ASCII") as err:
        read_token("has space", None)
    assert "has space" not in str(err.value)                 # the value is never echoed


def test_parse_node_tokens_items_and_file(tmp_path: Path) -> None:
    f = tmp_path / "tokens"
    f.write_text("# comment\nnode-a tok-a\n\nnode-b tok-b  # trailing\n")
    assert parse_node_tokens(["node-c=tok-c"], f) == {"node-c": "tok-c", "node-a": "tok-a", "node-b": "tok-b"}
    f.write_text("node-a\n")
    with pytest.raises(ConfigError, match="line 1"):
        parse_node_tokens([], f)
    with pytest.raises(ConfigError, match="two different tokens"):
        parse_node_tokens(["n=a", "n=b"], None)


def test_peer_host_and_loopback() -> None:
    assert peer_host("ipv4:10.1.2.3:4711") == "10.1.2.3"
    assert peer_host("ipv6:[::1]:4711") == "::1"
    assert peer_host("unix:/tmp/sock") == "unix:/tmp/sock"
    assert is_loopback("127.0.0.1:7400") and is_loopback("[::1]:7400") and is_loopback("localhost:1")
    assert not is_loopback("0.0.0.0:7400") and not is_loopback("10.0.0.1:7400")


# --------------------------------------------------------------------------- node identity


def test_certificate_mode_requires_matching_common_name() -> None:
    auth = NodeAuthorizer("certificate")
    assert auth.refusal("node-1", PeerIdentity("10.0.0.1", ("node-1",))) is None
    assert "issued to 'node-2'" in (auth.refusal("node-1", PeerIdentity("10.0.0.1", ("node-2",))) or "")
    assert "no verified client certificate" in (auth.refusal("node-1", PeerIdentity("10.0.0.1")) or "")
    # the same certificate from another host is the same identity (reconnect takeover allowed)
    assert auth.identity_key(PeerIdentity("a", ("node-1",))) == auth.identity_key(PeerIdentity("b", ("node-1",)))


def test_token_mode_checks_per_node_tokens_and_never_echoes_them() -> None:
    auth = NodeAuthorizer("token", {"node-1": "tok-one", "node-2": "tok-two"})
    assert auth.refusal("node-1", PeerIdentity("h", token="tok-one")) is None
    wrong = auth.refusal("node-1", PeerIdentity("h", token="tok-two"))   # another node's token
    assert wrong is not None and "tok-" not in wrong
    assert auth.refusal("node-1", PeerIdentity("h")) is not None
    assert "no sync token configured" in (auth.refusal("ghost", PeerIdentity("h", token="tok-one")) or "")
    assert auth.identity_key(PeerIdentity("a", token="x")) != auth.identity_key(PeerIdentity("a", token="y"))
    assert "tok-one" not in repr(PeerIdentity("h", token="tok-one"))
    assert "tok-one" not in PeerIdentity("h", token="tok-one").describe()


def test_node_tokens_can_be_replaced_but_token_mode_never_emptied() -> None:
    auth = NodeAuthorizer("token", {"node-1": "tok-old"})
    auth.set_tokens({"node-1": "tok-new"})
    assert auth.refusal("node-1", PeerIdentity("h", token="tok-new")) is None
    assert auth.refusal("node-1", PeerIdentity("h", token="tok-old")) is not None
    with pytest.raises(ValueError, match="at least one"):
        auth.set_tokens({})
    assert auth.refusal("node-1", PeerIdentity("h", token="tok-new")) is None   # refused change: nothing changed


def test_open_mode_identity_is_the_peer_host() -> None:
    auth = NodeAuthorizer("open")
    assert auth.refusal("anything", PeerIdentity("h")) is None
    assert auth.identity_key(PeerIdentity("h1")) != auth.identity_key(PeerIdentity("h2"))


def test_stream_admission_caps_per_host_pending_and_total() -> None:
    per_host = StreamAdmission(max_per_peer=2)
    assert per_host.admit("a") is None and per_host.admit("a") is None
    assert "max-streams-per-peer" in (per_host.admit("a") or "")
    assert per_host.admit("b") is None
    per_host.release("a", pending=True)
    assert per_host.count("a") == 1 and per_host.admit("a") is None

    pending = StreamAdmission(max_pending=2)
    assert pending.admit("a") is None and pending.admit("b") is None
    assert "max-pending-streams" in (pending.admit("c") or "")
    pending.hello_done()                       # one said Hello: room for another pending one
    assert pending.admit("c") is None and (pending.open, pending.pending) == (3, 2)

    total = StreamAdmission(max_streams=2)
    assert total.admit("a") is None and total.admit("b") is None
    total.hello_done()
    total.hello_done()
    assert "max-sync-streams" in (total.admit("c") or "")       # Hello done or not, both count
    total.release("a", pending=False)
    assert total.admit("c") is None
    assert total.refused == {"max-sync-streams": 1} and pending.refused == {"max-pending-streams": 1}


# --------------------------------------------------------------------------- certificates


def test_certs_command_writes_a_ca_and_node_certificates(tmp_path: Path) -> None:
    out = tmp_path / "pki"
    result = CliRunner().invoke(cli, ["certs", "--out", str(out), "--nodes", "2", "--node-id", "edge-7"])
    assert result.exit_code == 0, result.output
    ca = x509.load_pem_x509_certificate((out / "ca.pem").read_bytes())
    for name in ("node-1", "node-2", "edge-7", "coordinator", "operator"):
        cert = x509.load_pem_x509_certificate((out / f"{name}.pem").read_bytes())
        assert cert.subject.get_attributes_for_oid(NameOID.COMMON_NAME)[0].value == name
        assert cert.issuer == ca.subject
        cert.verify_directly_issued_by(ca)          # cryptography checks the CA signature
        eku = cert.extensions.get_extension_for_class(x509.ExtendedKeyUsage).value
        assert ExtendedKeyUsageOID.CLIENT_AUTH in eku and ExtendedKeyUsageOID.SERVER_AUTH in eku
        assert (out / f"{name}-key.pem").stat().st_mode & 0o077 == 0     # keys are private
    assert "edge-7 " in (out / "node-tokens.txt").read_text()
    again = CliRunner().invoke(cli, ["certs", "--out", str(out), "--nodes", "1"])
    assert again.exit_code != 0 and "--force" in again.output              # never overwrites silently
    bad = CliRunner().invoke(cli, ["certs", "--out", str(tmp_path / "x"), "--node-id", "bad id"])
    assert bad.exit_code != 0 and "a node id is 1 to 64 characters" in bad.output


@pytest.mark.parametrize("node_id", ["n\u043ede-1", "..", ".", "kelp/shed", "kelp\x07", "Node-1", "k" * 65])
def test_certs_makes_no_certificate_for_an_id_outside_the_alphabet(tmp_path: Path, node_id: str) -> None:
    # docs/node.md, "Node ids": the common name of a node certificate is its node id
    out = tmp_path / "pki"
    bad = CliRunner().invoke(cli, ["certs", "--out", str(out), "--node-id", "node-1", "--node-id", node_id])
    assert bad.exit_code == 2 and "a node id is 1 to 64 characters" in bad.output
    assert not out.exists()                                               # nothing written


def test_tls_files_validation_names_the_setting(tmp_path: Path, pki: Path) -> None:
    with pytest.raises(ConfigError, match="'tls-cert' and 'tls-key' go together"):
        TlsFiles(cert=pki / "node-1.pem").validate()
    with pytest.raises(ConfigError, match="'tls-client-auth' needs 'tls-ca'"):
        TlsFiles(pki / "node-1.pem", pki / "node-1-key.pem", client_auth=True).validate()
    junk = tmp_path / "junk.pem"
    junk.write_text("not a certificate")
    with pytest.raises(ConfigError, match="tls-cert.*no PEM"):
        TlsFiles(junk, pki / "node-1-key.pem").validate()
    TlsFiles(pki / "node-1.pem", pki / "node-1-key.pem", pki / "ca.pem", True).validate()


def test_plaintext_listener_needs_explicit_permission(loop: LoopThread, caplog: pytest.LogCaptureFixture) -> None:
    logger = logging.getLogger("test.security")

    async def check() -> None:
        server = grpc.aio.server()
        with pytest.raises(SecurityError, match="allow-plaintext"):
            open_port(server, "127.0.0.1:0", TlsFiles(), False, logger, "test service")
        with caplog.at_level(logging.WARNING, logger="test.security"):
            assert open_port(server, "127.0.0.1:0", TlsFiles(), True, logger, "test service") > 0
        await server.stop(0)
    loop.run(check())
    assert any("PLAINTEXT" in r.getMessage() for r in caplog.records)


def test_a_taken_listen_address_is_refused_not_shared(loop: LoopThread) -> None:
    """With SO_REUSEPORT off (EXCLUSIVE_PORT_OPTION), binding a port another server holds fails
    (socket(7): without SO_REUSEPORT a bound TCP port is exclusive); open_port says which address."""
    first, port = serve(loop, _Recorder())
    try:
        with pytest.raises(AddressInUse, match=f"127.0.0.1:{port}"):
            serve(loop, _Recorder(), address=f"127.0.0.1:{port}")
        assert _check(f"127.0.0.1:{port}", None) == grpc.StatusCode.OK          # the first keeps serving
    finally:
        loop.run(first.stop(0))


class _Recorder(health_aio.HealthServicer):
    def __init__(self) -> None:
        super().__init__()
        self.peers: list[PeerIdentity] = []

    async def Check(self, request: Any, context: grpc.aio.ServicerContext) -> Any:  # noqa: N802
        from shardsieve.security import peer_identity

        self.peers.append(peer_identity(context))
        return health_pb2.HealthCheckResponse(status=health_pb2.HealthCheckResponse.SERVING)


@pytest.fixture
def mtls_server(loop: LoopThread, pki: Path) -> Iterator[tuple[str, _Recorder]]:
    rec = _Recorder()
    tls = TlsFiles(pki / "coordinator.pem", pki / "coordinator-key.pem", pki / "ca.pem", client_auth=True)
    server, port = serve(loop, rec, tls=tls)
    yield f"127.0.0.1:{port}", rec
    loop.run(server.stop(0))


def _check(address: str, creds: grpc.ChannelCredentials | None) -> grpc.StatusCode:
    channel = grpc.secure_channel(address, creds) if creds else grpc.insecure_channel(address)
    with channel:
        try:
            health_pb2_grpc.HealthStub(channel).Check(health_pb2.HealthCheckRequest(), timeout=3)
            return grpc.StatusCode.OK
        except grpc.RpcError as exc:
            return exc.code()


def test_mutual_tls_handshake_and_peer_identity(mtls_server: tuple[str, _Recorder], pki: Path,
                                                 other_pki: Path) -> None:
    address, rec = mtls_server
    good = channel_credentials(pki / "ca.pem", pki / "node-2.pem", pki / "node-2-key.pem")
    assert _check(address, good) == grpc.StatusCode.OK
    assert rec.peers[-1].cert_names == ("node-2",) and rec.peers[-1].host == "127.0.0.1"
    # gRPC reports a refused TLS handshake as UNAVAILABLE (the call never reached the server)
    assert _check(address, None) == grpc.StatusCode.UNAVAILABLE                             # plaintext
    assert _check(address, channel_credentials(pki / "ca.pem")) == grpc.StatusCode.UNAVAILABLE  # no cert
    foreign = channel_credentials(pki / "ca.pem", other_pki / "node-1.pem", other_pki / "node-1-key.pem")
    assert _check(address, foreign) == grpc.StatusCode.UNAVAILABLE        # cert from another CA
    wrong_ca = channel_credentials(other_pki / "ca.pem", pki / "node-1.pem", pki / "node-1-key.pem")
    assert _check(address, wrong_ca) == grpc.StatusCode.UNAVAILABLE       # server not trusted
    assert len(rec.peers) == 1                                            # none of those got through


# --------------------------------------------------------------------------- interceptors


@pytest.fixture
def guarded(loop: LoopThread) -> Iterator[tuple[grpc.Channel, _Recorder]]:
    rec = _Recorder()
    server, port = serve(loop, rec, interceptors=[TokenGuard({"/grpc.health.v1.Health/Check": "the-token"}),
                                                  DecodeGuard()])
    with grpc.insecure_channel(f"127.0.0.1:{port}") as channel:
        yield channel, rec
    loop.run(server.stop(0))


def test_token_guard_refuses_missing_and_wrong_tokens(guarded: tuple[grpc.Channel, _Recorder]) -> None:
    channel, rec = guarded
    stub = health_pb2_grpc.HealthStub(channel)
    for metadata in ((), (("authorization", "Bearer wrong"),), (("authorization", "the-token"),)):
        with pytest.raises(grpc.RpcError) as err:
            stub.Check(health_pb2.HealthCheckRequest(), timeout=3, metadata=metadata)
        assert err.value.code() == grpc.StatusCode.UNAUTHENTICATED
        assert "the-token" not in (err.value.details() or "")
    assert rec.peers == []                                   # the servicer never ran
    stub.Check(health_pb2.HealthCheckRequest(), timeout=3, metadata=(("authorization", "Bearer the-token"),))
    assert len(rec.peers) == 1 and rec.peers[0].token == "the-token"


def test_decode_guard_answers_invalid_argument_for_garbage(guarded: tuple[grpc.Channel, _Recorder]) -> None:
    channel, rec = guarded
    raw = channel.unary_unary("/grpc.health.v1.Health/Check", request_serializer=lambda b: b,
                              response_deserializer=lambda b: b)
    with pytest.raises(grpc.RpcError) as err:
        raw(b"\x0a\xff\xff\xff\xff\xff", timeout=3, metadata=(("authorization", "Bearer the-token"),))
    assert err.value.code() == grpc.StatusCode.INVALID_ARGUMENT      # not INTERNAL
    assert rec.peers == []


def test_second_stream_needs_the_same_identity_as_the_connected_one() -> None:
    from shardsieve.coordinator.shell import CoordinatorShell
    from shardsieve.coordinator.sync_service import SyncService
    from shardsieve.sync.coordinator_side import CoordinatorSync, DictReplicaSink

    for mode, first, same, other in (
            ("open", PeerIdentity("10.0.0.1"), PeerIdentity("10.0.0.1"), PeerIdentity("10.0.0.2")),
            ("certificate", PeerIdentity("10.0.0.1", ("n1",)), PeerIdentity("10.0.0.9", ("n1",)),
             PeerIdentity("10.0.0.1", ("n2",)))):
        svc = SyncService(CoordinatorShell(CoordinatorSync(DictReplicaSink())), authorizer=NodeAuthorizer(mode))
        assert svc._refusal("n1", first) is None                   # nobody connected yet
        svc._current["n1"] = object()                              # n1's stream is open
        svc._identity["n1"] = svc.authorizer.identity_key(first)
        assert svc._refusal("n1", same) is None, mode               # reconnect takeover
        assert svc._refusal("n1", other) is not None, mode          # refused while n1 is connected


def test_token_guard_rules_can_be_replaced_at_once(loop: LoopThread) -> None:
    """Rotation: after update() the new token passes and the old one is refused; a guard made
    without tokens starts checking once it is given one."""
    rec = _Recorder()
    guard = TokenGuard({})
    server, port = serve(loop, rec, interceptors=[guard, DecodeGuard()])
    try:
        with grpc.insecure_channel(f"127.0.0.1:{port}") as channel:
            stub = health_pb2_grpc.HealthStub(channel)

            def code(token: str) -> grpc.StatusCode:
                metadata = (("authorization", f"Bearer {token}"),) if token else ()
                try:
                    stub.Check(health_pb2.HealthCheckRequest(), timeout=3, metadata=metadata)
                except grpc.RpcError as exc:
                    return exc.code()
                return grpc.StatusCode.OK

            assert code("") == grpc.StatusCode.OK and not guard.active
            guard.update({"/grpc.health.v1.Health/": "kelp-one"})
            assert code("") == grpc.StatusCode.UNAUTHENTICATED and code("kelp-one") == grpc.StatusCode.OK
            guard.update({"/grpc.health.v1.Health/": "kelp-two"})
            assert code("kelp-one") == grpc.StatusCode.UNAUTHENTICATED and code("kelp-two") == grpc.StatusCode.OK
    finally:
        loop.run(server.stop(0))
