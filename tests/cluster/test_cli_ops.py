"""The operator CLI against a live local cluster (real coordinator + node processes on loopback).

Outside checks: what the CLI reports is compared with what the nodes themselves answer on their
own NodeStorage API (Get, Stats), not only with the coordinator's view.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Iterator

import pytest
from click.testing import CliRunner

from shardsieve.cli.main import cli
from shardsieve.localcluster import LocalCluster
from shardsieve.testing.procs import free_port
from shardsieve.v1 import storage_pb2

pytestmark = pytest.mark.cluster

TOKEN = "brinewick-ops-token"


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LocalCluster]:
    with LocalCluster(tmp_path_factory.mktemp("cli-ops"), nodes=3, capacity=2000, token=TOKEN,
                      extra_coordinator_args=["--auto-rebuild", "false"]) as c:
        yield c


def run(cluster: LocalCluster, *args: str, token: str | None = TOKEN):  # type: ignore[no-untyped-def]
    env = {"SHARDSIEVE_COORDINATOR": cluster.coordinator_address, "SHARDSIEVE_TOKEN": token,
           "SHARDSIEVE_CONFIG": ""}
    return CliRunner().invoke(cli, list(args), env=env, catch_exceptions=False)


def run_process(*args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    """The real console entry point in a child process (exit code and stderr as a shell sees them)."""
    full = {**os.environ, "SHARDSIEVE_CONFIG": "", **(env or {})}
    return subprocess.run([sys.executable, "-m", "shardsieve.cli.main", *args], capture_output=True, text=True,
                          env=full, timeout=60)


def one_line(stderr: str) -> str:
    lines = [line for line in stderr.splitlines() if line.strip()]
    assert len(lines) == 1, stderr
    assert lines[0].startswith("Error: ") and "Traceback" not in stderr
    return lines[0]


def test_status_lists_every_node_fresh(cluster: LocalCluster) -> None:
    res = run(cluster, "status", "--json")
    assert res.exit_code == 0, res.output
    doc = json.loads(res.stdout)
    assert sorted(n["node_id"] for n in doc["nodes"]) == sorted(cluster.node_addresses)
    for n in doc["nodes"]:
        assert n["address"] == cluster.node_addresses[n["node_id"]]
        assert n["state"] == "fresh" and n["connected"] is True
        assert isinstance(n["capacity"], int) and isinstance(n["geometry"]["bits"], int)
    assert doc["mode"] in ("safe", "fast")
    res = run(cluster, "status")
    assert res.exit_code == 0
    assert all(nid in res.stdout for nid in cluster.node_addresses)


def test_put_get_locate_delete_round_trip(cluster: LocalCluster) -> None:
    key = "brinewick/gullrock/crate/BW00C0DE"
    res = run(cluster, "put", key, '{"product": "dulse"}', "--node", "node-2", "--json")
    assert res.exit_code == 0, res.output
    assert json.loads(res.stdout)["node_id"] == "node-2"
    # Outside check: the node's own store holds the value.
    got = cluster.storage("node-2").Get(storage_pb2.GetRequest(key=key.encode()), timeout=5)
    assert got.found and got.value == b'{"product": "dulse"}'
    res = run(cluster, "get", key)
    assert (res.exit_code, res.stdout.strip()) == (0, '{"product": "dulse"}')
    res = run(cluster, "locate", key, "--json")
    assert "node-2" in [c["node_id"] for c in json.loads(res.stdout)["candidates"]]
    res = run(cluster, "delete", key, "--json")
    assert json.loads(res.stdout) == {"key": key, "deleted": True, "node_ids": ["node-2"]}
    assert not cluster.storage("node-2").Get(storage_pb2.GetRequest(key=key.encode()), timeout=5).found
    res = run(cluster, "get", key, "--json")
    assert res.exit_code == 5 and json.loads(res.stdout)["found"] is False


def test_inspect_known_and_unknown_node(cluster: LocalCluster) -> None:
    res = run(cluster, "inspect", "node-1", "--json")
    assert res.exit_code == 0
    status = json.loads(res.stdout)["status"]
    stats = cluster.node_stats("node-1")   # the node's own figures
    assert status["node_id"] == "node-1"
    assert status["geometry"]["bits"] == stats.geometry.bits and status["epoch"] == stats.epoch
    proc = run_process("inspect", "ghost-node", "--coordinator", cluster.coordinator_address, "--token", TOKEN)
    assert proc.returncode == 5
    assert "ghost-node" in one_line(proc.stderr) and "shardsieve status" in proc.stderr


def test_rebuild_dry_run_then_wait(cluster: LocalCluster) -> None:
    before = cluster.node_stats("node-3")
    res = run(cluster, "rebuild", "node-3", "--capacity", "8000", "--dry-run", "--json")
    assert res.exit_code == 0, res.output
    plan = json.loads(res.stdout)["plan"]
    assert [p["node_id"] for p in plan] == ["node-3"] and plan[0]["capacity"] == 8000
    assert cluster.node_stats("node-3").epoch == before.epoch, "a dry run changes nothing"
    # Two nodes with the default limit of one rebuild at a time: the second is queued, and --wait
    # starts it once the first has swapped.
    res = run(cluster, "rebuild", "node-2", "node-3", "--capacity", "8000", "--wait", "--wait-timeout", "90",
              "--json")
    assert res.exit_code == 0, res.output
    doc = json.loads(res.stdout)
    assert [p["queued"] for p in doc["plan"]] == [False, True]
    done = {d["node_id"]: d for d in doc["completed"]}
    assert set(done) == {"node-2", "node-3"}
    for nid in ("node-2", "node-3"):
        assert done[nid]["epoch_after"] > done[nid]["epoch_before"]
        after = cluster.node_stats(nid)     # outside check: the node itself serves the new filter
        assert after.epoch == done[nid]["epoch_after"] and after.capacity == 8000
        assert after.geometry.bits == plan[0]["geometry"]["bits"]


def test_policy_show_set_and_invalid_values(cluster: LocalCluster) -> None:
    res = run(cluster, "policy", "set", "saturation-ratio=3", "growth=2.5", "--json")
    assert res.exit_code == 0, res.output
    assert json.loads(res.stdout)["saturation_ratio"] == 3.0
    shown = json.loads(run(cluster, "policy", "show", "--json").stdout)
    assert (shown["saturation_ratio"], shown["growth"]) == (3.0, 2.5)
    proc = run_process("policy", "set", "growth=0.5", "saturation-ratio=4", "--coordinator",
                       cluster.coordinator_address, "--token", TOKEN)
    assert proc.returncode == 6
    assert "growth" in one_line(proc.stderr)
    shown = json.loads(run(cluster, "policy", "show", "--json").stdout)
    assert shown["saturation_ratio"] == 3.0, "a request with one bad value changes nothing"
    res = run(cluster, "policy", "set", "no_such_knob=1")
    assert res.exit_code == 6
    assert "no_such_knob" in one_line(res.stderr)


def test_error_paths_exit_codes(cluster: LocalCluster) -> None:
    proc = run_process("status", "--coordinator", cluster.coordinator_address, "--token", "wrong")
    assert proc.returncode == 4
    assert "--token" in one_line(proc.stderr)
    proc = run_process("status", "--coordinator", f"127.0.0.1:{free_port()}", "--timeout", "2")
    assert proc.returncode == 3
    assert "cannot reach the coordinator" in one_line(proc.stderr)
    proc = run_process("rebuild", "node-1", "--fpr", "1.5", "--coordinator", cluster.coordinator_address)
    assert proc.returncode == 2
    assert "--fpr" in one_line(proc.stderr)


def test_config_file_supplies_address_and_token(cluster: LocalCluster, tmp_path: Path) -> None:
    cfg = tmp_path / "ops.toml"
    cfg.write_text(f'[cli]\ncoordinator = "{cluster.coordinator_address}"\ntoken = "{TOKEN}"\n')
    env = {k: v for k, v in os.environ.items() if k not in ("SHARDSIEVE_COORDINATOR", "SHARDSIEVE_TOKEN")}
    env["SHARDSIEVE_CONFIG"] = str(cfg)
    proc = subprocess.run([sys.executable, "-m", "shardsieve.cli.main", "status", "--json"], capture_output=True,
                          text=True, env=env, timeout=60)
    assert proc.returncode == 0, proc.stderr
    assert len(json.loads(proc.stdout)["nodes"]) == 3
    env["SHARDSIEVE_TOKEN"] = "wrong"     # the environment wins over the file
    proc = subprocess.run([sys.executable, "-m", "shardsieve.cli.main", "status"], capture_output=True,
                          text=True, env=env, timeout=60)
    assert proc.returncode == 4


def test_put_on_a_named_node_never_makes_a_second_copy_and_moves_only_when_asked(cluster: LocalCluster) -> None:
    # docs/cli.md, put: a key lives on one node; --node elsewhere is refused unless --move, which
    # writes the new copy, then deletes the old one
    from shardsieve.v1 import storage_pb2

    def held(node_id: str) -> bytes | None:
        reply = cluster.storage(node_id).Get(storage_pb2.GetRequest(key=b"pier/berth-12"),
                                             metadata=cluster.auth_metadata(), timeout=5)
        return reply.value if reply.found else None

    first = run(cluster, "put", "pier/berth-12", "kelp", "--node", "node-1", "--json")
    assert first.exit_code == 0, first.output
    refused = run(cluster, "put", "pier/berth-12", "oyster", "--node", "node-2")
    assert refused.exit_code == 6
    line = one_line(refused.stderr)
    assert "held by node-1" in line and "--move" in line
    assert (held("node-1"), held("node-2")) == (b"kelp", None)        # nothing changed
    moved = run(cluster, "put", "pier/berth-12", "oyster", "--node", "node-2", "--move", "--json")
    assert moved.exit_code == 0, moved.output
    assert json.loads(moved.stdout)["moved_from"] == ["node-1"]
    assert (held("node-1"), held("node-2")) == (None, b"oyster")
    got = run(cluster, "get", "pier/berth-12")
    assert (got.exit_code, got.stdout.strip()) == (0, "oyster")
    unknown = run(cluster, "put", "pier/berth-12", "x", "--node", "node-99")
    assert unknown.exit_code == 5 and "node-99" in one_line(unknown.stderr)
    no_node = run(cluster, "put", "pier/berth-12", "x", "--move")
    assert no_node.exit_code == 2 and "--node" in one_line(no_node.stderr)
