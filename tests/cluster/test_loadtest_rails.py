"""The load tester's rails, against real processes: a plot path that cannot work is refused
before anything is seeded; a plot that fails at the end never costs the report; the keys a run
seeds are removed at the end unless the operator keeps them."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from shardsieve.localcluster import LocalCluster

pytestmark = pytest.mark.cluster


def loadtest(cluster: LocalCluster, *args: str) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "SHARDSIEVE_CONFIG": ""}
    env.pop("SHARDSIEVE_TOKEN", None)
    return subprocess.run([sys.executable, "-m", "shardsieve.cli.main", "loadtest", "--coordinator",
                           cluster.coordinator_address, "--count", "200", "--concurrency", "2", "--seed", "3",
                           *args], capture_output=True, text=True, env=env, timeout=240)


def keys_on_nodes(cluster: LocalCluster) -> int:
    return sum(cluster.node_stats(n).key_count for n in cluster.node_handles)


def test_plot_path_and_seeded_keys(tmp_path: Path) -> None:
    with LocalCluster(tmp_path / "fleet", nodes=2, capacity=2000, fpr=0.01,
                      extra_coordinator_args=["--auto-rebuild", "false"]) as cluster:
        # 1. a plot folder that does not exist: refused up front (exit 6), nothing seeded, no folder made
        missing = tmp_path / "no-such-folder" / "lt.png"
        proc = loadtest(cluster, "--keys", "300", "--plot", str(missing))
        assert proc.returncode == 6, proc.stderr
        assert proc.stdout == "" and "does not exist" in proc.stderr and "nothing was run" in proc.stderr
        assert not missing.parent.exists()
        assert keys_on_nodes(cluster) == 0

        # 2. a plot that passes the check but cannot be written at the end (a dangling link):
        # the whole report still comes out, then exit 1 naming the plot; --keep-keys keeps the keys
        dangling = tmp_path / "plot.png"
        dangling.symlink_to(tmp_path / "gone" / "target.png")
        proc = loadtest(cluster, "--keys", "300", "--plot", str(dangling), "--keep-keys", "--json")
        assert proc.returncode == 1, proc.stderr
        report = json.loads(proc.stdout)
        assert report["lookups"] == 200 and report["false_negatives"] == 0
        assert report["plot"] is None and "could not write the plot" in report["plot_error"]
        assert "the report above is complete" in proc.stderr
        assert report["kept_seeded_keys"] is True and report["removed_seeded_keys"] == 0
        assert keys_on_nodes(cluster) == 300

        # 3. by default the run removes what it seeded (the kept keys of run 2 share its prefix,
        # since the seed is the same, and are removed with them) and says so
        proc = loadtest(cluster, "--keys", "300")
        assert proc.returncode == 0, proc.stderr
        assert "300 removed from the nodes" in proc.stdout
        assert keys_on_nodes(cluster) == 0
