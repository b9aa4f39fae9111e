"""A small load test against real processes: measured probes per lookup vs the prediction.

The check uses the Wilson (1927) score interval, written out here from its formula, around the
MEASURED wasted-probe rate, and asks that the predicted rate lies inside — a different method from
the report's own (exact binomial region around the prediction), so the two cross-check.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest

from shardsieve.localcluster import LocalCluster

pytestmark = pytest.mark.cluster

Z999 = 3.2905  # two-sided 99.9% standard-normal quantile (normal tables; recalled from memory)


def wilson(successes: int, trials: int, z: float = Z999) -> tuple[float, float]:
    """Wilson, JASA 22 (1927): (p + z^2/2n -/+ z sqrt(p(1-p)/n + z^2/4n^2)) / (1 + z^2/n)."""
    p = successes / trials
    centre = p + z * z / (2 * trials)
    half = z * math.sqrt(p * (1 - p) / trials + z * z / (4 * trials * trials))
    denom = 1 + z * z / trials
    return (centre - half) / denom, (centre + half) / denom


def test_small_loadtest_matches_prediction_without_false_negatives(tmp_path: Path) -> None:
    # Small filters at a 5% target so wasted probes are frequent enough for the interval to bite.
    with LocalCluster(tmp_path / "fleet", nodes=4, capacity=400, fpr=0.05,
                      extra_coordinator_args=["--auto-rebuild", "false"]) as cluster:
        env = {**os.environ, "SHARDSIEVE_CONFIG": ""}
        env.pop("SHARDSIEVE_TOKEN", None)
        proc = subprocess.run(
            [sys.executable, "-m", "shardsieve.cli.main", "loadtest", "--coordinator", cluster.coordinator_address,
             "--keys", "1600", "--count", "3000", "--concurrency", "4", "--seed", "7", "--json",
             "--plot", str(tmp_path / "lt.png"), "--keep-keys"],
            capture_output=True, text=True, env=env, timeout=240)
        assert proc.returncode == 0, proc.stderr[-2000:]
        report = json.loads(proc.stdout)
        status = cluster.fleet_status()
        node_fprs = {n.node_id: cluster.node_stats(n.node_id).predicted_fpr for n in status.nodes}

    for field in ("lookups", "throughput_per_s", "latency_ms", "probes_per_hit", "probes_per_miss",
                  "predicted_probes_per_hit", "predicted_probes_per_miss", "avoided_fanout", "false_negatives"):
        assert field in report
    assert set(report["latency_ms"]) >= {"p50", "p90", "p99", "max"}
    assert report["lookups"] == 3000
    assert report["false_negatives"] == 0
    assert report["errors"] == 0 and report["rebuilt_during_run"] == []
    assert (tmp_path / "lt.png").stat().st_size > 0

    # The prediction is the sum of the nodes' own predicted FPRs (fill^k as each node computes it).
    n_nodes = len(node_fprs)
    assert report["predicted_probes_per_miss"] == pytest.approx(sum(node_fprs.values()), rel=1e-6)
    p = report["predicted_probes_per_miss"] / n_nodes
    assert p > 0.005, "filters loaded enough for the check to have power"

    # Absent keys: every lookup is a fresh key, so wasted probes over misses x N trials are binomial.
    misses = report["misses"]
    wasted = round(report["probes_per_miss"] * misses)
    lo, hi = wilson(wasted, misses * n_nodes)
    assert lo <= p <= hi, (wasted, misses, p, lo, hi)

    # Existing keys: first reads of distinct keys; wasted = probes - 1 over N - 1 other nodes.
    hit = report["interval"]["hit"]
    p_hit = (hit["predicted"] - 1) / (n_nodes - 1)
    lo, hi = wilson(hit["wasted"], hit["trials"])
    assert lo <= p_hit <= hi, (hit, p_hit, lo, hi)
    assert report["interval"]["miss"]["inside"] and hit["inside"]

    # Avoided fan-out by its definition, 1 - probes / (lookups x N).
    probes = report["probes_per_hit"] * report["hits"] + report["probes_per_miss"] * misses
    assert report["avoided_fanout"] == pytest.approx(1 - probes / (report["lookups"] * n_nodes), rel=1e-9)
