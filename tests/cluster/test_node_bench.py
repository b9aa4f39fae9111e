"""`shardsieve bench node` runs end to end and reports the fields docs/node.md, "Benchmark" names.

Speed is not asserted (benchmarks print ratios; tests do not time things): the test checks
the benchmark measures what it says, on a small run against a real node process.
"""

from __future__ import annotations

import json
import math

import pytest
from click.testing import CliRunner

from shardsieve.cli.main import cli

pytestmark = pytest.mark.cluster

FIELDS = {"grpc_puts_per_s", "grpc_fraction_of_direct", "ack_to_push_p50_ms", "ack_to_push_p99_ms",
          "push_interval_ms"}


def test_bench_node_json_has_every_field() -> None:
    result = CliRunner().invoke(cli, ["bench", "node", "--puts", "32", "--latency-samples", "12",
                                      "--push-interval-ms", "20", "--json"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout.strip().splitlines()[-1])
    assert FIELDS <= set(data)
    assert data["push_interval_ms"] == 20 and data["clients"] == 8
    assert data["grpc_puts_per_s"] > 0 and data["direct_puts_per_s"] > 0
    # the ratio is the quotient of the two rates measured side by side in the same run
    assert data["grpc_fraction_of_direct"] == pytest.approx(data["grpc_puts_per_s"] / data["direct_puts_per_s"],
                                                            rel=1e-2)
    # every timed put was pushed, and its latency percentiles are ordered (p50 <= p99)
    assert data["latency_samples"] == 12 and data["latency_samples_never_pushed"] == 0
    assert not math.isnan(data["ack_to_push_p50_ms"])
    assert 0 <= data["ack_to_push_p50_ms"] <= data["ack_to_push_p99_ms"]
