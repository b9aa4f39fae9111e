"""`shardsieve tour` end to end, and Ctrl-C leaving no process behind."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from shardsieve.testing.procs import wait_until

pytestmark = [pytest.mark.cluster, pytest.mark.slow]

TOUR_DEADLINE_S = 180   # give up waiting for the tour after this long (a deadline, not a claim)


def children_of(pid: int) -> set[int]:
    """PIDs whose parent is `pid` (from /proc/<pid>/stat, field 4)."""
    found = set()
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
        except (FileNotFoundError, ProcessLookupError, IndexError):
            continue
        if int(fields[1]) == pid:
            found.add(int(entry.name))
    return found


def running(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (FileNotFoundError, ProcessLookupError):
        return False
    return state != "Z"


def tour_env() -> dict[str, str]:
    env = {**os.environ, "SHARDSIEVE_CONFIG": "", "PYTHONUNBUFFERED": "1"}
    env.pop("SHARDSIEVE_COORDINATOR", None)
    env.pop("SHARDSIEVE_TOKEN", None)
    return env


def test_tour_runs_end_to_end(tmp_path: Path) -> None:
    started = time.monotonic()
    proc = subprocess.run([sys.executable, "-m", "shardsieve.cli.main", "tour", "--dir", str(tmp_path / "d"),
                           "--json"], capture_output=True, text=True, env=tour_env(), timeout=TOUR_DEADLINE_S)
    elapsed = time.monotonic() - started
    # Printed for the README's figures, never asserted: speed is not a test's business.
    print(f"tour wall time: {elapsed:.1f} s")
    assert proc.returncode == 0, proc.stderr[-3000:]
    doc = json.loads(proc.stdout)
    report = doc["report"]
    assert doc["business"] == "Brinewick Kelp Cooperative" and doc["kept"] is False
    assert report["nodes"] == 8 and report["lookups"] > 0 and report["false_negatives"] == 0
    assert report["avoided_fanout"] > 0.5   # 8 nodes, ~1 probe per lookup
    assert Path(report["plot"]).is_file()
    # the loopback tour allows plaintext explicitly and says so (docs/security.md, "Protected by default")
    assert "plaintext" in proc.stderr and "allow-plaintext" in proc.stderr, proc.stderr[-2000:]


def test_ctrl_c_stops_every_daemon(tmp_path: Path) -> None:
    tour = subprocess.Popen([sys.executable, "-m", "shardsieve.cli.main", "tour", "--dir", str(tmp_path / "d"),
                             "--duration", "30"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=tour_env())
    try:
        # Wait until the coordinator and all 8 nodes are running (9 children), then interrupt.
        daemons = wait_until(lambda: (lambda c: c if len(c) >= 9 else None)(children_of(tour.pid)), 60,
                             interval=0.1, message="the tour's 9 daemon processes")
        tour.send_signal(signal.SIGINT)
        out, err = tour.communicate(timeout=60)
    finally:
        if tour.poll() is None:
            tour.kill()
            tour.wait()
    assert tour.returncode == 130, err[-2000:]
    assert "interrupted" in err
    survivors = [pid for pid in daemons if running(pid)]
    assert survivors == [], f"daemons left running: {survivors}"


def test_keep_leaves_the_fleet_running_and_prints_how_to_explore_it(tmp_path: Path) -> None:
    # With --keep the cluster stays up and the commands to explore it are printed (docs/loadtest.md,
    # "The tour")
    # (status, locate, rebuild). A small fleet keeps the test short.
    import re

    workdir = tmp_path / "kept"
    proc = subprocess.run([sys.executable, "-m", "shardsieve.cli.main", "tour", "--dir", str(workdir), "--keep",
                           "--nodes", "3", "--records", "1500", "--duration", "2"], capture_output=True, text=True,
                          env={**tour_env(), "COLUMNS": "200"}, timeout=120)
    pids_file = workdir / "pids"
    pids = [int(p) for p in pids_file.read_text().split()] if pids_file.exists() else []
    try:
        assert proc.returncode == 0, proc.stderr[-3000:]
        assert len(pids) == 4 and all(running(p) for p in pids), pids     # coordinator + 3 nodes
        for command in ("shardsieve status", "shardsieve locate", "shardsieve rebuild"):
            assert command in proc.stdout, proc.stdout[-2000:]
        address = re.search(r"export SHARDSIEVE_COORDINATOR=(\S+)", proc.stdout).group(1)
        # The printed address answers: the fleet is really there, every node in it.
        status = subprocess.run([sys.executable, "-m", "shardsieve.cli.main", "status", "--json"],
                                capture_output=True, text=True, timeout=60,
                                env={**tour_env(), "SHARDSIEVE_COORDINATOR": address})
        assert status.returncode == 0, status.stderr
        assert sorted(n["node_id"] for n in json.loads(status.stdout)["nodes"]) == ["shed-01", "shed-02", "shed-03"]
    finally:
        for pid in pids:            # the processes this test's tour left running, by id
            if running(pid):
                os.kill(pid, signal.SIGTERM)
        wait_until(lambda: not any(running(p) for p in pids), 30, message="kept tour daemons to stop")
