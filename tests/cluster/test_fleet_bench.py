"""`shardsieve bench fleet --json` end to end at a small fleet: a real coordinator process, a
process of simulated nodes on real sync streams, a Locate client process.

No speed is asserted (speed belongs to the bench itself). What is checked: every figure is
there for both fleet sizes; every ratio is the quotient of the figures it comes from; the
memory figures come from the coordinator process (/proc/PID/status, proc(5): VmHWM is the
peak of VmRSS, and the routing index keeps every replica's m/8 bytes resident); the counts
agree with each other; and Locate never missed a key's node (a Bloom filter holds every
inserted key: Bloom 1970).
"""

from __future__ import annotations

import json
import math
import subprocess

import pytest

from shardsieve.testing.procs import shardsieve_argv

pytestmark = pytest.mark.cluster

NODES = 64
BITS = 1 << 20

FIGURES = (
    "connect_s", "rss_idle_bytes", "rss_synced_bytes", "hwm_synced_bytes", "rss_end_bytes", "hwm_bytes",
    "sum_m_over_8_bytes", "memory_target_bytes", "rss_ratio_vs_sum_m_over_8", "hwm_ratio_vs_sum_m_over_8",
    "locate_p50_ms", "locate_p99_ms", "locate_batch_p50_ms", "locate_batch_p99_ms",
    "write_to_routable_p50_ms", "write_to_routable_p99_ms", "deltas_absorbed", "heartbeats_absorbed",
    "deltas_per_s", "heartbeats_per_s", "coordinator_cpu_s", "coordinator_cpu_s_per_delta", "window_s",
    "locate_owner_missing", "deltas_sent", "heartbeats_sent",
)


@pytest.fixture(scope="module")
def report() -> dict:
    done = subprocess.run(shardsieve_argv("bench", "fleet", "--nodes", str(NODES), "--duration", "3",
                                          "--bits", str(BITS), "--json"),
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-4000:]
    return json.loads(done.stdout)


def test_every_figure_is_there_for_both_fleet_sizes(report: dict) -> None:
    assert report["nodes"] == NODES and report["baseline_nodes"] == 8
    for size, part in ((8, report["baseline"]), (NODES, report["fleet"])):
        assert part["nodes"] == size
        missing = [name for name in FIGURES if name not in part]
        assert not missing, missing
        assert all(math.isfinite(part[name]) for name in FIGURES), part
    assert set(report["targets"]) == {"locate_p99_ms", "locate_p99_ratio_vs_8", "write_to_routable_p99_ms",
                                      "rss_synced_bytes"}
    assert all(isinstance(t["met"], bool) for t in report["targets"].values())


def test_ratios_are_the_quotients_of_their_figures(report: dict) -> None:
    base, fleet, targets = report["baseline"], report["fleet"], report["targets"]
    assert report["locate_p99_ratio_vs_8"] == pytest.approx(fleet["locate_p99_ms"] / base["locate_p99_ms"])
    assert targets["locate_p99_ratio_vs_8"]["value"] == report["locate_p99_ratio_vs_8"]
    assert report["locate_p50_ratio_vs_8"] == pytest.approx(fleet["locate_p50_ms"] / base["locate_p50_ms"])
    for part in (base, fleet):
        assert part["rss_ratio_vs_sum_m_over_8"] == pytest.approx(part["rss_synced_bytes"] / part["sum_m_over_8_bytes"])
        assert part["hwm_ratio_vs_sum_m_over_8"] == pytest.approx(part["hwm_bytes"] / part["sum_m_over_8_bytes"])
        assert part["deltas_per_s"] == pytest.approx(part["deltas_absorbed"] / part["window_s"])
        assert part["heartbeats_per_s"] == pytest.approx(part["heartbeats_absorbed"] / part["window_s"])
        assert part["coordinator_cpu_s_per_delta"] == pytest.approx(part["coordinator_cpu_s"] / part["deltas_absorbed"])
    # the target: 1.2 x sum of m/8 + 200 MiB, and the verdict is the comparison
    assert fleet["memory_target_bytes"] == int(1.2 * fleet["sum_m_over_8_bytes"] + 200 * (1 << 20))
    rss = targets["rss_synced_bytes"]
    assert rss["value"] == fleet["rss_synced_bytes"] and rss["bound"] == fleet["memory_target_bytes"]
    assert rss["met"] == (rss["value"] <= rss["bound"])
    routable = targets["write_to_routable_p99_ms"]
    assert routable["bound"] == 3 * report["settings"]["push_interval_ms"]
    assert routable["met"] == (routable["value"] <= routable["bound"])


def test_memory_figures_are_measured_from_the_coordinator_process(report: dict) -> None:
    for part in (report["baseline"], report["fleet"]):
        # sum of m/8 over the fleet's filters: m bits = m/8 bytes each
        assert part["sum_m_over_8_bytes"] == part["nodes"] * BITS // 8
        # VmHWM is the peak of VmRSS (proc(5)), so it is never below a VmRSS read before it
        assert part["hwm_bytes"] >= max(part["rss_synced_bytes"], part["rss_end_bytes"], part["hwm_synced_bytes"])
        assert part["hwm_synced_bytes"] >= part["rss_synced_bytes"] > 0
        # the index holds every replica's m/8 bytes, written in when installed: resident
        assert part["rss_synced_bytes"] - part["rss_idle_bytes"] >= part["sum_m_over_8_bytes"]


def test_counts_agree_and_locate_lists_every_owner(report: dict) -> None:
    for part in (report["baseline"], report["fleet"]):
        assert part["locate_owner_missing"] == 0
        assert 0 < part["deltas_absorbed"] <= part["deltas_sent"]
        assert part["write_to_routable_deltas"] + part["write_to_routable_unseen"] \
            + part["write_to_routable_listed_before_cut"] == part["deltas_sent"]
        assert part["writers"] == max(1, round(part["nodes"] * 0.1))
    settings = report["settings"]
    assert settings["stale_after_s"] > settings["heartbeat_ms"] / 1000.0   # stale only after missed heartbeats
    assert settings["max_sync_streams"] >= NODES and settings["max_pending_streams"] >= NODES
