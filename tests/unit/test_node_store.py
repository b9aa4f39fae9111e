"""Node store backends: SqliteStore against the MemoryStore model, transactions, durability settings.

Reference for ordering: Python's own sorted() on bytes (lexicographic, unsigned bytes), which
is what SQLite's BLOB comparison (memcmp) gives — SQLite docs, "Datatypes In SQLite", 4.1
("BLOB values ... compared using memcmp()").
"""

from __future__ import annotations

import random
import sqlite3
from pathlib import Path

import pytest

from shardsieve.node.store import MemoryStore, SqliteStore, StoreError, iter_all_keys, open_store


@pytest.fixture(params=["memory", "sqlite"])
def store(request: pytest.FixtureRequest, tmp_path: Path):
    s = open_store(request.param, tmp_path / "data")
    yield s
    s.close()


def test_put_reports_created_then_overwrite(store) -> None:
    assert store.put_many([(b"a", b"1"), (b"b", b"2")]) == [True, True]
    assert store.put_many([(b"a", b"3"), (b"c", b"4"), (b"c", b"5")]) == [False, True, False]
    assert store.get(b"a") == b"3"
    assert store.get(b"c") == b"5"
    assert store.get_many([b"a", b"zz", b"b"]) == [b"3", None, b"2"]


def test_delete_reports_existed(store) -> None:
    store.put_many([(b"k1", b"v")])
    assert store.delete_many([b"k1", b"k1", b"nope"]) == [True, False, False]
    assert store.get(b"k1") is None
    assert store.count() == 0


def test_random_ops_match_a_dict_model(store) -> None:
    """Model check: a Python dict is the reference for contents; sorted() for scan order."""
    rng = random.Random(7)
    model: dict[bytes, bytes] = {}
    for _ in range(300):
        keys = [bytes(rng.randrange(256) for _ in range(rng.randrange(1, 4))) for _ in range(rng.randrange(1, 6))]
        if rng.random() < 0.6:
            items = [(k, rng.randbytes(3)) for k in keys]
            expect = []
            seen = set(model)
            for k, v in items:
                expect.append(k not in seen)
                seen.add(k)
                model[k] = v
            assert store.put_many(items) == expect
        else:
            expect = []
            for k in keys:
                expect.append(k in model)
                model.pop(k, None)
            assert store.delete_many(keys) == expect
    assert store.count() == len(model)
    scanned = [k for batch in iter_all_keys(store, batch=7) for k in batch]
    assert scanned == sorted(model)  # bytewise order (SQLite memcmp on BLOBs)
    assert store.get_many(sorted(model)) == [model[k] for k in sorted(model)]


def test_scan_after_is_exclusive(store) -> None:
    store.put_many([(bytes([i]), b"") for i in range(10)])
    assert store.scan(bytes([3]), 3) == [bytes([4]), bytes([5]), bytes([6])]
    assert store.scan(None, 2) == [bytes([0]), bytes([1])]
    assert store.scan(bytes([9]), 5) == []


def test_meta_roundtrip(store) -> None:
    assert store.get_meta("epoch") is None
    store.set_meta({"epoch": "3", "capacity": "1000"})
    assert store.get_meta("epoch") == "3"
    store.set_meta({"epoch": "4"})
    assert store.get_meta("epoch") == "4"
    assert store.get_meta("capacity") == "1000"


def test_sqlite_persists_across_reopen_and_uses_wal(tmp_path: Path) -> None:
    s = SqliteStore(tmp_path, "full")
    s.put_many([(b"x", b"1"), (b"y", b"2")])
    s.set_meta({"epoch": "7"})
    s.close()
    s2 = SqliteStore(tmp_path, "normal")
    try:
        assert s2.get(b"x") == b"1" and s2.count() == 2 and s2.get_meta("epoch") == "7"
    finally:
        s2.close()
    # Independent check with a fresh sqlite3 connection (the stdlib module, not our code).
    conn = sqlite3.connect(tmp_path / "node.sqlite3")
    try:
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    finally:
        conn.close()


def test_sqlite_sync_level_is_applied(tmp_path: Path) -> None:
    """PRAGMA synchronous values: 1 = NORMAL, 2 = FULL (SQLite docs, "PRAGMA synchronous")."""
    for level, number in (("full", 2), ("normal", 1)):
        s = SqliteStore(tmp_path / level, level)
        try:
            assert s._writer.execute("PRAGMA synchronous").fetchone()[0] == number
        finally:
            s.close()


def test_failed_batch_writes_nothing(tmp_path: Path) -> None:
    """A batch whose last item fails (a value the driver cannot bind) leaves no item behind."""
    s = SqliteStore(tmp_path)
    try:
        with pytest.raises((StoreError, sqlite3.Error, TypeError, ValueError)):
            s.put_many([(b"ok1", b"v"), (b"ok2", object())])  # type: ignore[list-item]
        assert s.get(b"ok1") is None and s.count() == 0
        assert s.put_many([(b"ok1", b"v")]) == [True]  # the store still works afterwards
    finally:
        s.close()


def test_bad_sync_level_and_unknown_kind(tmp_path: Path) -> None:
    with pytest.raises(StoreError, match="sync level"):
        SqliteStore(tmp_path, "sometimes")
    with pytest.raises(StoreError, match="unknown store kind"):
        open_store("tape", tmp_path)
    assert isinstance(open_store("memory", None), MemoryStore)
