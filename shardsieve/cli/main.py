"""Entry point of the `shardsieve` console script."""

from __future__ import annotations

import click

from shardsieve import __version__
from shardsieve.cli.lazy import LazyGroup

COMMANDS = {
    "plan": "shardsieve.cli.plan:plan",
    "bench": "shardsieve.cli.bench:bench",
    "node": "shardsieve.node.cli:node_command",
    "agent": "shardsieve.node.agent_cli:agent_command",
    "agent-retire": "shardsieve.node.agent_cli:agent_retire_command",
    "coordinator": "shardsieve.coordinator.cli:coordinator_command",
    "status": "shardsieve.cli.ops:status",
    "inspect": "shardsieve.cli.ops:inspect_node",
    "rebuild": "shardsieve.cli.ops:rebuild",
    "locate": "shardsieve.cli.ops:locate",
    "get": "shardsieve.cli.ops:get",
    "put": "shardsieve.cli.ops:put",
    "delete": "shardsieve.cli.ops:delete",
    "policy": "shardsieve.cli.ops:policy",
    "unlist": "shardsieve.cli.ops:unlist",
    "loadtest": "shardsieve.cli.loadtest:loadtest",
    "tour": "shardsieve.cli.tour:tour",
    "health": "shardsieve.cli.health:health",
    "certs": "shardsieve.cli.certs:certs",
}


@click.group(cls=LazyGroup, lazy_commands=COMMANDS, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="shardsieve")
def cli() -> None:
    """Route key lookups in a sharded store to the nodes whose Bloom filters may hold the key.

    Daemons: `node`, `coordinator`, `agent` (the filter of a Redis or PostgreSQL store you
    run; `agent-retire` removes what it left there). Planning and measurement: `plan`, `bench`, `loadtest`,
    `tour`. Operating a fleet: `status`, `inspect`, `rebuild`, `locate`, `get`, `put`,
    `delete`, `policy`, `unlist`. Setup and checks: `certs`, `health`.
    """


def main() -> None:
    cli(prog_name="shardsieve")


if __name__ == "__main__":
    main()
