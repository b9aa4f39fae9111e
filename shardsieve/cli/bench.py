"""`shardsieve bench ...`: benchmarks that print ratios against a side-by-side baseline."""

from __future__ import annotations

import click

from shardsieve.cli.lazy import LazyGroup


@click.group(cls=LazyGroup, lazy_commands={
    "agent": "shardsieve.bench.agent_bench:bench_agent",
    "filter": "shardsieve.bench.filter_bench:bench_filter",
    "fleet": "shardsieve.bench.fleet_bench:bench_fleet",
    "node": "shardsieve.bench.node_bench:bench_node",
    "reads": "shardsieve.bench.reads_bench:bench_reads",
    "routing": "shardsieve.bench.routing_bench:bench_routing",
})
def bench() -> None:
    """Measure a component against a baseline run side by side in the same process.

    Machines are shared and noisy, so every figure that matters is printed as a ratio
    against a baseline measured in the same run.
    """
