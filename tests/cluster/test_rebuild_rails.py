"""Rebuild rails on real processes (docs/coordinator.md, "Rebuild rails"; docs/node.md, "Rebuild").

A node streams to two coordinators: A with the default max-filter-bits, B with 2^20 bits.
- B refuses, before anything starts, a rebuild whose filter it could not take (exit 6, the node
  untouched), shows such plans with their filter bytes in a dry run, and refuses
  max-concurrent-rebuilds=0.
- A, whose limit allows it, rebuilds the node past B's limit: B then refuses the node's stream,
  naming the setting, and the node logs what to change. The way back: a rebuild through A to a
  size B takes, after which B takes the node's stream again.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from shardsieve.localcluster import LocalCluster
from shardsieve.testing.procs import free_port, start_daemon, wait_until

pytestmark = pytest.mark.cluster

SMALL_LIMIT = 1 << 20


def cli(coordinator: str, *args: str) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "SHARDSIEVE_CONFIG": "", "COLUMNS": "220"}
    env.pop("SHARDSIEVE_TOKEN", None)
    return subprocess.run([sys.executable, "-m", "shardsieve.cli.main", *args, "--coordinator", coordinator],
                          capture_output=True, text=True, env=env, timeout=180)


def node_at(coordinator: str, node_id: str) -> dict:
    proc = cli(coordinator, "status", "--json")
    assert proc.returncode == 0, proc.stderr
    return next((n for n in json.loads(proc.stdout)["nodes"] if n["node_id"] == node_id), {})


def test_rebuilds_a_coordinator_cannot_take_are_refused_and_a_node_has_a_way_back(tmp_path: Path) -> None:
    b_addr = f"127.0.0.1:{free_port()}"
    b = start_daemon([sys.executable, "-m", "shardsieve.cli.main", "coordinator", "--listen", b_addr, "--id", "coord-b",
                      "--allow-plaintext", "true", "--max-filter-bits", str(SMALL_LIMIT), "--auto-rebuild", "false",
                      "--log-format", "text"], tmp_path / "coordinator-b.log", health_address=b_addr)
    try:
        with LocalCluster(tmp_path / "fleet", nodes=1, node_ids=["reef-1"], capacity=5000,
                          extra_node_args=["--coordinator", b_addr],
                          extra_coordinator_args=["--auto-rebuild", "false"]) as cluster:
            a_addr = cluster.coordinator_address
            wait_until(lambda: node_at(b_addr, "reef-1").get("state") == "fresh", 30, message="reef-1 fresh at B")
            epoch_b = node_at(b_addr, "reef-1")["epoch"]

            # 1. refused before anything starts: too large for B's max-filter-bits
            refused = cli(b_addr, "rebuild", "reef-1", "--capacity", "200000")
            assert refused.returncode == 6, refused.stderr
            assert "nothing was started" in refused.stderr and "max-filter-bits" in refused.stderr
            # 2. a dry run shows the plan, its filter bytes and why it would not start
            dry = cli(b_addr, "rebuild", "reef-1", "--capacity", "100000000000", "--dry-run", "--json")
            assert dry.returncode == 0, dry.stderr
            (plan,) = json.loads(dry.stdout)["plan"]                    # 2^40 bits: said, with its bytes
            assert plan["filter_bytes"] == 1 << 37 and "max-filter-bits" in plan["refused"]
            dry = cli(b_addr, "rebuild", "reef-1", "--capacity", "1000000000000", "--dry-run", "--json")
            (plan,) = json.loads(dry.stdout)["plan"]
            assert "largest geometry" in plan["refused"] and plan["filter_bytes"] == 0
            dry = cli(b_addr, "rebuild", "reef-1", "--capacity", "200000", "--dry-run", "--json")
            (plan,) = json.loads(dry.stdout)["plan"]
            assert plan["filter_bytes"] == plan["geometry"]["bits"] // 8 == (1 << 21) // 8
            assert "max-filter-bits" in plan["refused"]
            # 3. a concurrency limit of 0 would leave requests waiting forever: refused
            zero = cli(b_addr, "policy", "set", "max-concurrent-rebuilds=0")
            assert zero.returncode == 6 and "auto-rebuild=false" in zero.stderr
            assert node_at(b_addr, "reef-1")["epoch"] == epoch_b          # nothing changed
            assert node_at(a_addr, "reef-1")["state"] == "fresh"

            # 4. While B is away, A (whose limit allows it) grows the node past B's limit; back, B
            # refuses the node's stream by its setting, and the node says what to change
            b.stop()
            grown = cli(a_addr, "rebuild", "reef-1", "--capacity", "200000", "--wait", "--json")
            assert grown.returncode == 0, grown.stderr
            (done,) = json.loads(grown.stdout)["completed"]
            assert done["geometry"]["bits"] == 1 << 21 and not done["given_up"]
            b_restarted = start_daemon(b.argv, tmp_path / "coordinator-b.log", health_address=b_addr)
            node_log = cluster.node_process("reef-1").log_path
            wait_until(lambda: "a coordinator refuses this node's filter" in node_log.read_text(), 30,
                       message="the node says which setting and what to change")
            assert node_at(b_addr, "reef-1").get("state") != "fresh"
            assert "max-filter-bits" in (tmp_path / "coordinator-b.log").read_text()

            # 5. the way back: a rebuild through A to a size B takes
            back = cli(a_addr, "rebuild", "reef-1", "--capacity", "5000", "--wait", "--json")
            assert back.returncode == 0, back.stderr
            assert json.loads(back.stdout)["completed"][0]["geometry"]["bits"] <= SMALL_LIMIT
            wait_until(lambda: node_at(b_addr, "reef-1").get("state") == "fresh", 60, message="B takes reef-1 again")
            put = cli(a_addr, "put", "reef/anchor-3", "kelp")
            assert put.returncode == 0, put.stderr
            got = cli(b_addr, "get", "reef/anchor-3")
            assert (got.returncode, got.stdout.strip()) == (0, "kelp"), got.stderr
    finally:
        b.stop()
        if "b_restarted" in locals():
            b_restarted.stop()
