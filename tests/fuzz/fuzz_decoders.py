"""atheris (coverage-guided, libFuzzer) harnesses for the decoders of peer input.

Not collected by pytest (no test_ prefix). Run one target for a while, e.g.:

    python tests/fuzz/fuzz_decoders.py delta -max_total_time=60
    python tests/fuzz/fuzz_decoders.py snapshot|sync|config|cli -max_total_time=60

A crasher is written by libFuzzer as crash-<sha1>; turn it into a regression case in
tests/property/test_fuzz_decoders.py (REGRESSIONS_* / an explicit test) and fix the decoder.
Each target has the same property as its hypothesis twin: accepted whole, or refused with
the decoder's own error type; anything else is a crash.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import atheris

with atheris.instrument_imports():
    from google.protobuf.message import DecodeError

    from shardsieve import codec
    from shardsieve.config import ConfigError, load_settings
    from shardsieve.geometry import Geometry
    from shardsieve.limits import SyncLimits, check_node_message
    from shardsieve.snapshot import SnapshotAssembler, SnapshotError
    from shardsieve.sync.coordinator_side import CoordinatorSync, DictReplicaSink
    from shardsieve.sync.errors import SyncError
    from shardsieve.v1 import sync_pb2

    import shardsieve.coordinator.settings  # noqa: F401 - instrumented for the config and cli targets
    import shardsieve.node.settings  # noqa: F401

BITS = (64, 1024, 1 << 20, 1 << 40)


def fuzz_delta(data: bytes) -> None:
    fdp = atheris.FuzzedDataProvider(data)
    bits = BITS[fdp.ConsumeIntInRange(0, len(BITS) - 1)]
    try:
        changes = codec.decode_delta(fdp.ConsumeBytes(fdp.remaining_bytes()), bits, max_positions=1 << 16)
    except codec.CodecError:
        return
    assert changes.set_positions.size == 0 or int(changes.set_positions.max()) < bits


def fuzz_snapshot(data: bytes) -> None:
    fdp = atheris.FuzzedDataProvider(data)
    try:
        asm = SnapshotAssembler(Geometry(bits=1024 << fdp.ConsumeIntInRange(0, 3), hashes=3),
                                encoding=fdp.ConsumeIntInRange(0, 4), chunk_count=fdp.ConsumeIntInRange(0, 4),
                                total_bytes=fdp.ConsumeIntInRange(0, 1100), checksum=fdp.ConsumeUInt(8),
                                max_total_bytes=1 << 20)
        while fdp.remaining_bytes():
            asm.add(fdp.ConsumeIntInRange(0, 4), fdp.ConsumeBytes(fdp.ConsumeIntInRange(0, 400)))
        if asm.complete:
            asm.finish()
    except SnapshotError:
        return


_HELLO = sync_pb2.Hello(node_id="n1", geometry=Geometry(bits=1024, hashes=3).to_proto(), epoch=1,
                        protocol_version=1)


def _structured_message(fdp: atheris.FuzzedDataProvider) -> sync_pb2.NodeMessage:
    """A NodeMessage whose fields come from the fuzzer (random bytes rarely parse as protobuf)."""
    from shardsieve.v1 import filter_pb2

    kind = fdp.ConsumeIntInRange(0, 4)
    if kind == 0:
        return sync_pb2.NodeMessage.FromString(fdp.ConsumeBytes(fdp.ConsumeIntInRange(0, 64)))
    if kind == 1:
        return sync_pb2.NodeMessage(delta=filter_pb2.Delta(
            epoch=fdp.ConsumeIntInRange(0, 2), sequence=fdp.ConsumeIntInRange(0, 3), checksum=fdp.ConsumeUInt(8),
            payload=fdp.ConsumeBytes(fdp.ConsumeIntInRange(0, 200)), key_count=fdp.ConsumeUInt(4)))
    if kind == 2:
        return sync_pb2.NodeMessage(snapshot_chunk=filter_pb2.SnapshotChunk(
            snapshot_id=fdp.ConsumeIntInRange(0, 4), epoch=fdp.ConsumeIntInRange(0, 2),
            sequence=fdp.ConsumeIntInRange(0, 3),
            geometry=filter_pb2.Geometry(bits=1 << fdp.ConsumeIntInRange(0, 41), hashes=fdp.ConsumeIntInRange(0, 40),
                                         scheme=fdp.ConsumeIntInRange(0, 2), seed=fdp.ConsumeUInt(4)),
            encoding=fdp.ConsumeIntInRange(0, 4), purpose=fdp.ConsumeIntInRange(0, 3),
            chunk_index=fdp.ConsumeIntInRange(0, 3), chunk_count=fdp.ConsumeIntInRange(0, 5000),
            total_bytes=fdp.ConsumeIntInRange(0, 1 << 20), checksum=fdp.ConsumeUInt(8), key_count=fdp.ConsumeUInt(4),
            data=fdp.ConsumeBytes(fdp.ConsumeIntInRange(0, 300))))
    if kind == 3:
        return sync_pb2.NodeMessage(heartbeat=sync_pb2.Heartbeat(stats=sync_pb2.NodeStats(
            key_count=fdp.ConsumeUInt(8), rebuild_phase=fdp.ConsumeUnicodeNoSurrogates(8))))
    return sync_pb2.NodeMessage(hello=sync_pb2.Hello(node_id=fdp.ConsumeUnicodeNoSurrogates(6), protocol_version=1,
                                                     geometry=filter_pb2.Geometry(bits=1024, hashes=3, scheme=1)))


def fuzz_sync(data: bytes) -> None:
    sync = CoordinatorSync(DictReplicaSink())
    sync.open("s", _HELLO, 0.0)
    fdp = atheris.FuzzedDataProvider(data)
    while fdp.remaining_bytes():
        try:
            msg = _structured_message(fdp)
        except DecodeError:
            continue
        try:
            check_node_message(msg, SyncLimits(max_filter_bits=1 << 20))
            sync.receive("n1", "s", msg, 1.0)
        except SyncError:
            return


def fuzz_config(data: bytes) -> None:
    from shardsieve.coordinator.settings import CoordinatorSettings

    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "c.toml"
        path.write_bytes(b"[coordinator]\n" + data)
        try:
            load_settings(CoordinatorSettings, config_file=path, section="coordinator", environ={})
        except ConfigError:
            return


def fuzz_cli(data: bytes) -> None:
    """CLI / environment values: each setting given as arbitrary text, as a flag would carry it."""
    import dataclasses

    from shardsieve.coordinator.settings import CoordinatorSettings
    from shardsieve.node.settings import NodeSettings

    fdp = atheris.FuzzedDataProvider(data)
    cls = (CoordinatorSettings, NodeSettings)[fdp.ConsumeIntInRange(0, 1)]
    names = [f.name for f in dataclasses.fields(cls)]
    flags = {names[fdp.ConsumeIntInRange(0, len(names) - 1)]: fdp.ConsumeUnicodeNoSurrogates(16)
             for _ in range(fdp.ConsumeIntInRange(1, 4))}
    if cls is NodeSettings:
        flags.setdefault("id", "n1")
    try:
        load_settings(cls, environ={}, overrides=flags)
    except ConfigError:
        return


TARGETS = {"delta": fuzz_delta, "snapshot": fuzz_snapshot, "sync": fuzz_sync, "config": fuzz_config,
           "cli": fuzz_cli}

if __name__ == "__main__":
    if len(sys.argv) < 2 or sys.argv[1] not in TARGETS:
        sys.exit(f"usage: {sys.argv[0]} {{{','.join(TARGETS)}}} [libFuzzer options]")
    target = TARGETS[sys.argv.pop(1)]
    atheris.Setup(sys.argv, target)
    atheris.Fuzz()
