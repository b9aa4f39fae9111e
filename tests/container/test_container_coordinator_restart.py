"""The coordinator container is killed and restarted while clients keep writing and reading.

Reference: docs/architecture.md#who-owns-which-state (a coordinator's state is soft: replicas
come back from the nodes), docs/architecture.md#1-no-false-negatives-once-synced (through restarts
of either side) and docs/architecture.md#3-bounded-staleness (nodes not yet resynced are stale and
safe mode lists them for every key). Measured and printed, never asserted (speed belongs in the
README's figures): coordinator container start -> every node synced.
"""

from __future__ import annotations

import random
import threading
import time

import pytest

from shardsieve.testing.history import History
from shardsieve.testing.procs import wait_until

pytestmark = [pytest.mark.container, pytest.mark.cluster, pytest.mark.timeout(240)]

SEED_KEYS = 150          # invented scenario: orders of a fictional bakery chain, "crumbworth"
RESYNC_DEADLINE_S = 60.0  # how long to wait for the resync before giving up (a deadline, not a claim)


def key_of(i: int) -> bytes:
    return f"crumbworth/order/{i:06d}".encode()


def value_of(i: int) -> bytes:
    return f"loaves-{i % 13}|shop-{i % 5}".encode()


class Load:
    """One writer and one reader thread through the coordinator until stopped; counts outcomes."""

    def __init__(self, driver, first_key: int) -> None:  # noqa: ANN001
        self.driver = driver
        self.next_key = first_key
        self.acked: list[int] = list(range(first_key))
        self.lock = threading.Lock()
        self.stop = threading.Event()
        self.counts = {"write_ok": 0, "write_err": 0, "found": 0, "absent": 0, "error": 0}
        self.threads = [threading.Thread(target=self._writer, daemon=True),
                        threading.Thread(target=self._reader, daemon=True)]

    def _count(self, what: str) -> None:
        with self.lock:
            self.counts[what] += 1

    def _writer(self) -> None:
        while not self.stop.is_set():
            i = self.next_key
            self.next_key += 1
            if self.driver.write(key_of(i), value_of(i)):
                with self.lock:
                    self.acked.append(i)
                self._count("write_ok")
            else:
                self._count("write_err")
                self.stop.wait(0.05)   # back off while the coordinator is away (pacing, not syncing)

    def _reader(self) -> None:
        rng = random.Random(7)
        while not self.stop.is_set():
            with self.lock:
                i = rng.choice(self.acked)
            kind, value, _ = self.driver.read(key_of(i), deadline_ms=1000)
            self._count(kind)
            if kind == "error":
                self.stop.wait(0.05)

    def __enter__(self) -> "Load":
        for t in self.threads:
            t.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop.set()
        for t in self.threads:
            t.join(10)

    def snapshot(self) -> dict[str, int]:
        with self.lock:
            return dict(self.counts)


def test_coordinator_restart_under_load_resyncs_all_nodes_without_false_negatives(cluster, report_time) -> None:
    coordinator = cluster.start_coordinator()
    nodes = [cluster.start_node(f"node-{i}", [coordinator.alias]) for i in (1, 2, 3)]
    cluster.wait_synced(coordinator, nodes)
    history = History()
    driver = cluster.driver(coordinator, history)
    for i in range(SEED_KEYS):
        assert driver.write(key_of(i), value_of(i)), "writes to a healthy fleet are acknowledged"

    with Load(driver, SEED_KEYS) as load:
        wait_until(lambda: load.snapshot()["write_ok"] >= 30 and load.snapshot()["found"] >= 30, 30,
                   message=lambda: f"load to run before the restart ({load.snapshot()})")
        cluster.kill(coordinator)
        killed = time.monotonic()
        before = load.snapshot()
        cluster.restart(coordinator)          # same container: same state volume, alias and host port
        started = time.monotonic()
        cluster.wait_serving(coordinator)
        cluster.wait_synced(coordinator, nodes, timeout=RESYNC_DEADLINE_S)
        all_synced = time.monotonic()
        # Keep the load on after the resync, so reads span the whole restart.
        wait_until(lambda: load.snapshot()["found"] >= before["found"] + 30, 30,
                   message=lambda: f"reads to resume after the restart ({load.snapshot()})")
    counts = load.snapshot()

    report_time("coordinator restart: container start -> all nodes synced", all_synced - started)
    report_time("coordinator restart: kill -> all nodes synced", all_synced - killed,
                detail="load over the run: " + ", ".join(f"{k} {v}" for k, v in counts.items()))
    # Zero false negatives in safe mode: no acknowledged key was ever read as absent.
    assert counts["absent"] == 0, counts
    assert counts["write_ok"] > before["write_ok"], "writes resumed after the restart"
    history.assert_ok()

    # Every acknowledged write is readable through the restarted coordinator.
    for i in sorted(load.acked):
        outcome = driver.read(key_of(i))
        assert outcome[:2] == ("found", value_of(i)), (i, outcome)
