"""Units of the agents (docs/agents.md): the ledger's verified transitions, the applier's
event merging, the pgoutput decoder, the Redis set-up check, the state file, the embedded
agent and the runnable example in docs/agents.md."""

from __future__ import annotations

import json
import re
import struct
from pathlib import Path

import pytest

from shardsieve.node.adapters import pgoutput
from shardsieve.node.adapters.applier import coalesce
from shardsieve.node.adapters.embedded import EmbeddedAgent
from shardsieve.node.adapters.ledger import MemoryKeyLedger, SqliteKeyLedger
from shardsieve.node.adapters.meta import MetaFile
from shardsieve.node.adapters.redis_store import merged_notify_flags, missing_notify_flags
from shardsieve.node.store import KeysAdded, KeysRemoved, Listed, StoreError, open_external

ROOT = Path(__file__).resolve().parents[2]


@pytest.mark.parametrize("make", [lambda tmp: MemoryKeyLedger(), lambda tmp: SqliteKeyLedger(tmp)])
def test_ledger_flags_are_the_verified_transitions(make, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    ledger = make(tmp_path)
    assert ledger.put_many([(b"b", b""), (b"a", b""), (b"b", b"")]) == [True, True, False]
    assert ledger.delete_many([b"a", b"a", b"zz"]) == [True, False, False]
    assert ledger.write_batch([("put", [(b"c", b"")]), ("delete", [b"b"])]) == [[True], [True]]
    assert ledger.scan(None, 10) == [b"c"] and ledger.count() == 1
    ledger.put_many([(bytes([i]), b"") for i in range(5)])
    assert ledger.scan(bytes([1]), 2) == [bytes([2]), bytes([3])]    # byte order, strictly after the cursor
    ledger.clear()
    assert ledger.count() == 0
    ledger.close()


def test_coalesce_merges_runs_and_keeps_order_and_the_last_position() -> None:
    events = [KeysAdded((b"a",), 1), KeysAdded((b"b",), None), KeysRemoved((b"a",), 3), Listed((b"c",)),
              KeysRemoved((b"d",), 4)]
    assert coalesce(events) == [KeysAdded((b"a", b"b"), 1), KeysRemoved((b"a",), 3), Listed((b"c",)),
                                KeysRemoved((b"d",), 4)]


def _tuple(*values: bytes | None) -> bytes:
    out = struct.pack(">h", len(values))
    for v in values:
        out += b"n" if v is None else b"t" + struct.pack(">i", len(v)) + v
    return out


def test_pgoutput_messages_decode_per_the_documented_layout() -> None:
    """Byte layouts per PostgreSQL docs, "Logical Replication Message Formats" (protocol 1)."""
    rel = (b"R" + struct.pack(">I", 16386) + b"public\x00harvest\x00d" + struct.pack(">h", 2)
           + b"\x01tag\x00" + struct.pack(">Ii", 25, -1) + b"\x00note\x00" + struct.pack(">Ii", 25, -1))
    decoded = pgoutput.decode(rel)
    assert decoded == pgoutput.Relation(16386, "public", "harvest", "d", (
        pgoutput.Column("tag", 25, True), pgoutput.Column("note", 25, False)))
    update = b"U" + struct.pack(">I", 16386) + b"K" + _tuple(b"bed-2", None) + b"N" + _tuple(b"bed-9", b"x")
    assert pgoutput.decode(update) == pgoutput.Update(16386, (b"bed-2", None), (b"bed-9", b"x"))
    assert pgoutput.decode(b"D" + struct.pack(">I", 7) + b"K" + _tuple(b"k")) == pgoutput.Delete(7, (b"k",))
    assert pgoutput.decode(b"T" + struct.pack(">ib", 2, 0) + struct.pack(">II", 7, 9)) == pgoutput.Truncate((7, 9))
    commit = b"C\x00" + struct.pack(">qqq", 100, 148, 0)
    assert pgoutput.decode(commit) == pgoutput.Commit(100, 148)
    msg = b"M\x00" + struct.pack(">q", 5) + b"shardsieve-mark:x\x00" + struct.pack(">i", 3) + b"a:1"
    assert pgoutput.decode(msg) == pgoutput.LogicalMessage(False, 5, "shardsieve-mark:x", b"a:1")
    with pytest.raises(pgoutput.PgOutputError, match="truncated"):
        pgoutput.decode(update[:-3])
    with pytest.raises(pgoutput.PgOutputError, match="unknown"):
        pgoutput.decode(b"Z")


def test_notify_flags_need_e_g_x_e_n_and_keep_the_others() -> None:
    """Classes per Redis docs, "Keyspace notifications": A is g$lshzxetd and leaves out n."""
    assert missing_notify_flags("") == "Egxen"
    assert missing_notify_flags("AKE") == "n"
    assert missing_notify_flags("KEA n") == ""
    assert merged_notify_flags("Kl") == "KlEgxen"


def test_the_state_file_survives_a_reopen_and_refuses_garbage(tmp_path: Path) -> None:
    meta = MetaFile(tmp_path / "agent-state.json")
    meta.set_meta({"epoch": "4"})
    meta.set_meta({"capacity": "1000"})
    assert MetaFile(tmp_path / "agent-state.json").get_meta("epoch") == "4"
    assert json.loads((tmp_path / "agent-state.json").read_text()) == {"capacity": "1000", "epoch": "4"}
    (tmp_path / "bad.json").write_text("[1, 2]")
    with pytest.raises(StoreError, match="not a JSON object"):
        MetaFile(tmp_path / "bad.json")


def test_store_addresses_are_checked() -> None:
    with pytest.raises(StoreError, match="unknown store address"):
        open_external("mongodb://x")
    with pytest.raises(StoreError, match="must be a number"):
        open_external("redis://127.0.0.1:1/kelp")


def test_the_embedded_agent_counts_only_verified_transitions(tmp_path: Path) -> None:
    agent = EmbeddedAgent("gullrock-shed", capacity=1000, target_fpr=0.01, state_dir=tmp_path,
                          background_rebuild=False)
    with pytest.raises(RuntimeError, match="start"):
        agent.changed(added=[b"x"])
    agent.start([b"crate:1", b"crate:2", b"crate:1"])
    agent.changed(added=[b"crate:2"])            # an overwrite reported as an addition
    agent.changed(removed=[b"crate:9"])          # never counted: not uncounted
    agent.changed(removed=[b"crate:1"])
    assert agent.core.key_count == 1 and agent.ledger.count() == 1
    with agent.core.lock:
        assert agent.core.sync is not None
        assert agent.core.sync.filter.contains(b"crate:2") and not agent.core.sync.filter.contains(b"crate:1")
    assert agent.ledger.get_meta("epoch") == "1"


def test_the_example_in_docs_agents_runs(capsys: pytest.CaptureFixture[str]) -> None:
    text = (ROOT / "docs" / "agents.md").read_text()
    section = text[text.index("## Embedded agent"):]
    code = re.search(r"```python\n(.*?)```", section, re.S)
    assert code is not None
    exec(compile(code.group(1), "docs/agents.md", "exec"), {})  # noqa: S102 - our own doc
    assert capsys.readouterr().out.startswith("2 keys;")


def test_a_rebuild_scans_the_ledger_in_byte_order_while_changes_arrive(tmp_path: Path) -> None:
    """NodeSync's rebuild rule (docs/sync-protocol.md, "The rebuild hand-over") holds for an
    agent because its scan reads the ledger under the same lock as every verified change."""
    from shardsieve.bloom import BloomFilter

    agent = EmbeddedAgent("gullrock-shed", capacity=200, target_fpr=0.05, background_rebuild=False, scan_batch=7)
    agent.start([f"crate:{i:03d}".encode() for i in range(100)])
    agent.core.request_rebuild(2000, 0.01)
    step = 0
    while not agent.core.rebuild_step():
        agent.changed(added=[f"order:{step:03d}".encode()], removed=[f"crate:{step:03d}".encode()])
        step += 1
    keys = sorted(bytes(k) for k in agent.ledger.scan(None, 10_000))
    with agent.core.lock:
        assert agent.core.sync is not None
        oracle = BloomFilter(agent.core.sync.geometry)
        oracle.add_batch(keys)
        assert agent.core.sync.geometry.bits > 2000 and agent.core.sync.filter.bits == oracle.bits


@pytest.mark.parametrize("values", [(b"bed-9", b"x"), (None, b"x"), (b"", None), (b"a" * 300, b"\x00\r\n")])
def test_the_insert_fast_path_reads_the_column_decode_reads(values: tuple) -> None:  # type: ignore[type-arg]
    """insert_value must agree with the full decoder on every column it is asked for (same
    layout: PostgreSQL docs, "Logical Replication Message Formats", Insert and TupleData)."""
    payload = b"I" + struct.pack(">I", 16386) + b"N" + _tuple(*values)
    full = pgoutput.decode(payload)
    assert isinstance(full, pgoutput.Insert)
    for index, expected in enumerate(full.new):
        assert pgoutput.insert_value(payload, 16386, index) == expected
    assert pgoutput.insert_value(payload, 16387, 0) is pgoutput.NOT_THIS          # another relation
    assert pgoutput.insert_value(b"D" + payload[1:], 16386, 0) is pgoutput.NOT_THIS
    with pytest.raises(pgoutput.PgOutputError):
        pgoutput.insert_value(payload[:-1], 16386, len(values) - 1)               # truncated
    with pytest.raises(pgoutput.PgOutputError):
        pgoutput.insert_value(payload, 16386, len(values))                        # no such column
