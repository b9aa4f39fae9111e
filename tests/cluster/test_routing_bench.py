"""`shardsieve bench routing --json` runs end to end and reports every field docs/cli.md
("Planning, benchmarks and setup") names.

Speed is not asserted (benchmarks print ratios; tests do not time things): the test checks the
benchmark reports what it says, on a small key count, and that its ratios are the quotients of
the raw figures measured in the same run. It starts a real node + coordinator (write-to-routable).
"""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from shardsieve.cli.main import cli

pytestmark = [pytest.mark.cluster, pytest.mark.timeout(180)]

FIELDS = {"keys_per_s_8", "keys_per_s_64", "keys_per_s_256", "per_key_cost_ratio_256_vs_8",
          "speedup_vs_per_node_loop_64", "grpc_batch_keys_per_s", "grpc_fraction_of_in_process",
          "locate_p50_ms", "locate_p99_ms", "write_to_routable_p99_ms", "memory_ratio_vs_m_over_8",
          "memory_ratio_by_group_size", "install_peak_allocation_vs_m_over_8", "install_longest_lock_hold_ms",
          "locate_p99_ratio_during_vs_without_install"}


def test_bench_routing_json_has_every_field() -> None:
    result = CliRunner().invoke(cli, ["bench", "routing", "--json", "--keys", "1000", "--writes", "5",
                                      "--push-interval-ms", "50"], env={"SHARDSIEVE_CONFIG": ""})
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout)
    assert FIELDS <= set(data), FIELDS - set(data)
    assert data["batch_keys"] == 1000
    for name in ("keys_per_s_8", "keys_per_s_64", "keys_per_s_256", "grpc_batch_keys_per_s",
                 "per_node_loop_keys_per_s_64"):
        assert data[name] > 0
    assert data["per_key_cost_ratio_256_vs_8"] == pytest.approx(data["keys_per_s_8"] / data["keys_per_s_256"])
    # Beside it, the same fleets on one thread, and the thread count the figures above used.
    assert data["locate_threads"] >= 1
    assert data["per_key_cost_ratio_256_vs_8_one_thread"] == pytest.approx(
        data["keys_per_s_8_one_thread"] / data["keys_per_s_256_one_thread"])
    assert data["speedup_vs_per_node_loop_64"] == pytest.approx(
        data["keys_per_s_64_beside_loop"] / data["per_node_loop_keys_per_s_64"])
    assert data["grpc_fraction_of_in_process"] == pytest.approx(
        data["grpc_batch_keys_per_s"] / data["in_process_router_batch_1000_keys_per_s"])
    assert data["grpc_fraction_of_index_whole_batch"] == pytest.approx(
        data["grpc_batch_keys_per_s"] / data["keys_per_s_64_beside_grpc"])
    assert 0 < data["locate_p50_ms"] <= data["locate_p99_ms"]
    assert data["write_to_routable_p99_ms"] > 0
    # 256 nodes fill four 64-bit words per row exactly: one bit per node per filter position, so the
    # index holds m/8 bytes per node filter (one bit per position; common practice).
    assert data["memory_ratio_vs_m_over_8_at_256"] == pytest.approx(1.0)
    # The memory figure is the worst over the group sizes, by joins and by leaves, within the
    # bound the index states (coordinator/routing_index.py: at most 1/16 of the slots free).
    by_size = data["memory_ratio_by_group_size"]
    assert {f"{phase}_{n}" for phase in ("join", "leave") for n in (1, 2, 7, 8, 9, 63, 64, 65)} <= set(by_size)
    assert data["memory_ratio_vs_m_over_8"] == max(by_size.values())
    assert 1.0 <= data["memory_ratio_vs_m_over_8"] <= 1 + 1 / 16
    assert data["install_peak_allocation_vs_m_over_8"] >= 1.0   # the new filter's own m/8 bytes at least
    assert data["locate_p99_ratio_during_vs_without_install"] == pytest.approx(
        data["locate_p99_during_install_ms"] / data["locate_p99_without_install_ms"])
    # The targets block names the bounds the benchmark checks, write-to-routable as push interval +
    # 100 ms (docs/architecture.md#3-bounded-staleness: push interval plus network delay).
    targets = data["targets"]
    assert targets["write_to_routable_p99_ms"]["bound"] == 150.0
    assert {k: (v["op"], v["bound"]) for k, v in targets.items() if k != "write_to_routable_p99_ms"} == {
        "per_key_cost_ratio_256_vs_8": ("<=", 1.5), "speedup_vs_per_node_loop_64": (">=", 10.0),
        "grpc_fraction_of_in_process": (">=", 0.25), "memory_ratio_vs_m_over_8": ("<=", 1.10)}
