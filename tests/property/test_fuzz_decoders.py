"""Every decoder of peer or operator input under hypothesis: delta and position codecs,
snapshot assembly, the coordinator's sync protocol object fed arbitrary NodeMessage bytes,
config files, CLI values and the operator client's settings.

The property for each: the input is accepted whole, or refused with the decoder's own
error type (CodecError, SnapshotError, SyncError, ConfigError, ClientError, a click usage
error), never another exception, and a refused input changes nothing. Crashers found by
fuzzing (here or by the atheris harnesses in tests/fuzz/) are kept in REGRESSIONS below.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from google.protobuf.message import DecodeError
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from shardsieve.coordinator.settings import CoordinatorSettings
from shardsieve.node.settings import NodeSettings
from shardsieve import codec
from shardsieve.bloom import BloomFilter
from shardsieve.changeset import ChangeSet
from shardsieve.client import ClientError, CliSettings, resolve_settings
from shardsieve.config import ConfigError, load_settings
from shardsieve.geometry import Geometry
from shardsieve.limits import SyncLimits, check_node_message
from shardsieve.snapshot import SnapshotAssembler, SnapshotError, encode_snapshot
from shardsieve.sync.coordinator_side import CoordinatorSync, DictReplicaSink
from shardsieve.sync.errors import SyncError
from shardsieve.v1 import filter_pb2, sync_pb2

FUZZ = settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
BITS = st.sampled_from([1, 7, 64, 1024, 4096, 1 << 20, 1 << 40])

# Inputs that once crashed a decoder (found by fuzzing); each runs as an @example below.
REGRESSIONS_DELTA: list[tuple[bytes, int]] = [
    (b"\x01\x00\x00\x00\x00\x00\x00", 1024),
    (b"\x01\xff\xff\xff\xff\xff\xff\xff\xff\xff\x01", 1 << 40),
]


def _valid_delta(bits: int, seed: int) -> bytes:
    rng = np.random.default_rng(seed)
    pos = np.unique(rng.integers(0, bits, size=min(bits, 40), dtype=np.uint64))
    half = len(pos) // 2
    return codec.encode_delta(ChangeSet(pos[:half], pos[half:]), bits)


@st.composite
def delta_inputs(draw: st.DrawFn) -> tuple[bytes, int]:
    bits = draw(BITS)
    if draw(st.booleans()):
        return draw(st.binary(max_size=80)), bits
    data = bytearray(_valid_delta(max(bits, 64), draw(st.integers(0, 1000))))
    for _ in range(draw(st.integers(1, 4))):                # mutate a valid delta
        op = draw(st.sampled_from(["flip", "cut", "insert"]))
        i = draw(st.integers(0, max(0, len(data) - 1)))
        if op == "flip" and data:
            data[i] ^= draw(st.integers(1, 255))
        elif op == "cut":
            del data[i:]
        else:
            data[i:i] = draw(st.binary(min_size=1, max_size=4))
    return bytes(data), max(bits, 64)


@FUZZ
@given(delta_inputs())
@example(REGRESSIONS_DELTA[0])
@example(REGRESSIONS_DELTA[1])
def test_decode_delta_returns_a_valid_changeset_or_a_codec_error(case: tuple[bytes, int]) -> None:
    data, bits = case
    try:
        changes = codec.decode_delta(data, bits, max_positions=10_000)
    except codec.CodecError:
        return
    for arr in (changes.set_positions, changes.cleared_positions):
        assert arr.size == 0 or (int(arr.max()) < bits and bool(np.all(np.diff(arr.astype(np.int64)) > 0)))
    assert not np.intersect1d(changes.set_positions, changes.cleared_positions).size
    # what decoded re-encodes to the very same bytes (the format has one encoding per change set)
    assert codec.encode_delta(changes, bits) == data


@FUZZ
@given(st.binary(max_size=64), BITS)
def test_decode_positions_never_crashes(data: bytes, bits: int) -> None:
    try:
        pos = codec.decode_positions(data, bits, max_positions=10_000)
    except codec.CodecError:
        return
    assert pos.size == 0 or int(pos.max()) < bits


@st.composite
def snapshot_headers(draw: st.DrawFn) -> dict[str, object]:
    g = Geometry(bits=draw(st.sampled_from([1024, 2048, 1 << 16])), hashes=draw(st.integers(1, 8)))
    return dict(geometry=g, encoding=draw(st.integers(-1, 5)), chunk_count=draw(st.integers(0, 4)),
                total_bytes=draw(st.integers(0, 300)), checksum=draw(st.integers(0, (1 << 64) - 1)))


@FUZZ
@given(snapshot_headers(), st.lists(st.tuples(st.integers(-1, 4), st.binary(max_size=300)), max_size=6))
def test_snapshot_assembly_yields_a_verified_filter_or_a_snapshot_error(
        header: dict[str, object], chunks: list[tuple[int, bytes]]) -> None:
    try:
        asm = SnapshotAssembler(**header, max_total_bytes=1 << 20)  # type: ignore[arg-type]
        for index, data in chunks:
            asm.add(index, data)
        if not asm.complete:
            return
        bloom = asm.finish()
    except SnapshotError:
        return
    assert bloom.checksum == header["checksum"]           # never a filter the header did not promise


def _synced_coordinator() -> tuple[CoordinatorSync, DictReplicaSink, BloomFilter]:
    sink = DictReplicaSink()
    sync = CoordinatorSync(sink)
    g = Geometry(bits=1024, hashes=3)
    bloom = BloomFilter(g)
    bloom.add_batch([f"tidewater-bin-{i}".encode() for i in range(30)])
    sync.open("s1", sync_pb2.Hello(node_id="n1", geometry=g.to_proto(), epoch=1, sequence=0, checksum=bloom.checksum,
                                   protocol_version=1, key_count=30, capacity=100), 0.0)
    enc = encode_snapshot(bloom)
    for i, data in enumerate(enc.chunks):
        sync.receive("n1", "s1", sync_pb2.NodeMessage(snapshot_chunk=filter_pb2.SnapshotChunk(
            snapshot_id=1, epoch=1, sequence=0, geometry=g.to_proto(), encoding=enc.encoding, chunk_index=i,
            chunk_count=enc.chunk_count, total_bytes=enc.total_bytes, data=data, checksum=bloom.checksum,
            key_count=30)), 0.1)
    assert sink.replicas["n1"] == bloom
    return sync, sink, bloom


@st.composite
def node_messages(draw: st.DrawFn) -> sync_pb2.NodeMessage | bytes:
    kind = draw(st.sampled_from(["raw", "delta", "chunk", "hello", "heartbeat"]))
    if kind == "raw":
        return draw(st.binary(max_size=200))
    if kind == "delta":
        payload = draw(st.one_of(st.binary(max_size=60), st.just(_valid_delta(1024, draw(st.integers(0, 50))))))
        return sync_pb2.NodeMessage(delta=filter_pb2.Delta(
            epoch=draw(st.integers(0, 3)), sequence=draw(st.integers(0, 3)), payload=payload,
            checksum=draw(st.integers(0, (1 << 64) - 1)), key_count=draw(st.integers(0, 1 << 40))))
    if kind == "chunk":
        return sync_pb2.NodeMessage(snapshot_chunk=filter_pb2.SnapshotChunk(
            snapshot_id=draw(st.integers(0, 5)), epoch=draw(st.integers(0, 3)), sequence=draw(st.integers(0, 3)),
            geometry=filter_pb2.Geometry(bits=draw(st.sampled_from([0, 1024, 4096, 1 << 41])),
                                         hashes=draw(st.integers(0, 40)), scheme=draw(st.integers(0, 2))),
            encoding=draw(st.integers(0, 4)), purpose=draw(st.integers(0, 3)), chunk_index=draw(st.integers(0, 3)),
            chunk_count=draw(st.integers(0, 5000)), total_bytes=draw(st.integers(0, 1 << 30)),
            data=draw(st.binary(max_size=200)), checksum=draw(st.integers(0, (1 << 64) - 1))))
    if kind == "hello":
        return sync_pb2.NodeMessage(hello=sync_pb2.Hello(node_id=draw(st.text(max_size=5))))
    return sync_pb2.NodeMessage(heartbeat=sync_pb2.Heartbeat(stats=sync_pb2.NodeStats(
        rebuild_phase=draw(st.text(max_size=10)), key_count=draw(st.integers(0, 1 << 60)))))


@FUZZ
@given(st.lists(node_messages(), min_size=1, max_size=12))
def test_coordinator_sync_refuses_or_ignores_hostile_messages(msgs: list[sync_pb2.NodeMessage | bytes]) -> None:
    """The servicer's order: bytes -> NodeMessage (or refusal), limits, then the protocol object.
    The replica always holds the state the node announced with its checksum: any hostile
    message either leaves it as it was or is refused."""
    sync, sink, bloom = _synced_coordinator()
    limits = SyncLimits(max_filter_bits=1 << 20)
    for item in msgs:
        try:
            msg = sync_pb2.NodeMessage.FromString(item) if isinstance(item, bytes) else item
        except DecodeError:
            continue                                  # the servicer answers INVALID_ARGUMENT
        try:
            check_node_message(msg, limits)
            sync.receive("n1", "s1", msg, 1.0)
        except SyncError as exc:
            assert exc.grpc_status_name in ("INVALID_ARGUMENT", "FAILED_PRECONDITION", "RESOURCE_EXHAUSTED",
                                            "ABORTED")
            break                                     # the stream ends here
        view = sync.node("n1")
        assert view is not None
        assert sink.replicas["n1"].checksum == view.checksum
    assert sink.replicas["n1"] == bloom               # random input never matches a real change


# --------------------------------------------------------------------------- config and CLI values

SETTING_VALUES = st.one_of(st.text(max_size=12), st.integers(-(1 << 70), 1 << 70), st.booleans(),
                           st.floats(allow_nan=True, allow_infinity=True), st.lists(st.text(max_size=6), max_size=3))


def _toml_value(v: object) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return {"nan": "nan", "inf": "inf", "-inf": "-inf"}.get(repr(v), repr(v))
    if isinstance(v, int):
        return str(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return '"' + str(v).replace("\\", "\\\\").replace('"', '\\"').encode("unicode_escape").decode() + '"'


@pytest.mark.parametrize("cls, section", [(CoordinatorSettings, "coordinator"), (NodeSettings, "node"),
                                          (CliSettings, "cli")])
@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                  HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_config_files_load_or_fail_with_a_config_error(cls: type, section: str, data: st.DataObject,
                                                       tmp_path: Path) -> None:
    names = [f.name.replace("_", "-") for f in dataclasses.fields(cls)] + ["no-such-setting"]
    entries = data.draw(st.dictionaries(st.sampled_from(names), SETTING_VALUES, max_size=4))
    garbage = data.draw(st.sampled_from(["", "", "[[", "= 1", "\x00"]))
    text = f"[{section}]\n" + "".join(f"{k} = {_toml_value(v)}\n" for k, v in entries.items()) + garbage
    path = tmp_path / "fuzz.toml"
    path.write_text(text)
    try:
        loaded = load_settings(cls, config_file=path, section=section, environ={})
    except ConfigError as exc:
        assert str(exc)                                 # names the problem
        return
    assert isinstance(loaded, cls)


@pytest.mark.parametrize("cls", [CoordinatorSettings, NodeSettings])
@settings(max_examples=150, deadline=None)
@given(data=st.data())
def test_cli_values_coerce_or_fail_with_a_config_error(cls: type, data: st.DataObject) -> None:
    names = [f.name for f in dataclasses.fields(cls)]
    flags = data.draw(st.dictionaries(st.sampled_from(names), st.text(max_size=12), max_size=4))
    if cls is NodeSettings:
        flags.setdefault("id", "n1")
    try:
        load_settings(cls, environ={}, overrides=flags)
    except ConfigError:
        pass


@settings(max_examples=200, deadline=None)
@given(st.one_of(st.none(), st.text(max_size=20)), st.one_of(st.none(), st.text(max_size=10)),
       st.one_of(st.none(), st.floats(allow_nan=True)))
@example(None, None, float("nan"))      # regression: a NaN timeout was accepted (found by this test)
@example(None, None, float("inf"))
def test_client_settings_resolve_or_fail_with_a_client_error(coordinator: str | None, token: str | None,
                                                             timeout: float | None) -> None:
    try:
        s = resolve_settings(coordinator, token, None, timeout, environ={"HOME": "/nonexistent"})
    except ClientError as exc:
        assert exc.exit_code > 0
        return
    assert s.timeout_s > 0


@settings(max_examples=80, deadline=None)
@given(st.lists(st.sampled_from(["--keys", "--fpr", "--nodes", "--json"]) | st.text(max_size=8), max_size=6))
def test_plan_cli_values_never_crash(args: list[str]) -> None:
    from shardsieve.cli.main import cli

    result = CliRunner().invoke(cli, ["plan", *args])
    assert result.exit_code in (0, 2), (args, result.output, result.exception)
    assert result.exception is None or isinstance(result.exception, SystemExit)


@pytest.mark.parametrize("cls, flags", [
    (NodeSettings, {"id": "n1", "sync_token_file": "\x00"}),          # found by fuzzing: a NUL byte in a path
    (NodeSettings, {"id": "n1", "tls_cert": "a\x00", "tls_key": "b"}),
    (CoordinatorSettings, {"node_token_file": "\x00"}),
    (CoordinatorSettings, {"read_token_file": "x\x00y"}),
])
def test_regression_nul_bytes_in_paths_are_config_errors(cls: type, flags: dict[str, str]) -> None:
    with pytest.raises(ConfigError, match="cannot read"):
        load_settings(cls, environ={}, overrides=flags)


# Crashers found by the atheris harness tests/fuzz/fuzz_decoders.py (target "config"), kept as bytes.
REGRESSIONS_CONFIG_BYTES = [bytes.fromhex("ed08"), b"id = \"\xff\"\n"]


@pytest.mark.parametrize("raw", REGRESSIONS_CONFIG_BYTES)
def test_regression_non_utf8_config_file_is_a_config_error(raw: bytes, tmp_path: Path) -> None:
    path = tmp_path / "c.toml"
    path.write_bytes(b"[coordinator]\n" + raw)
    with pytest.raises(ConfigError, match="not UTF-8"):
        load_settings(CoordinatorSettings, config_file=path, section="coordinator", environ={})


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(raw=st.binary(max_size=60))
def test_config_file_bytes_load_or_fail_with_a_config_error(raw: bytes, tmp_path: Path) -> None:
    path = tmp_path / "c.toml"
    path.write_bytes(b"[node]\nid = \"n1\"\n" + raw)
    try:
        load_settings(NodeSettings, config_file=path, section="node", environ={})
    except ConfigError:
        pass
