"""`shardsieve coordinator`: run a coordinator (filter replicas, routing, reads/writes, accounting, rebuilds)."""

from __future__ import annotations

import dataclasses
import sys
from pathlib import Path

import click

from coordinator.settings import ENV_PREFIX, SECTION, CoordinatorSettings
from shardsieve.config import ConfigError, describe, env_name, load_settings

_EPILOG = ("Every setting can also come from the [coordinator] table of the --config TOML file (key as "
           "written below) or from an environment variable; flags win over the environment, which wins "
           "over the file, which wins over the default.\n\n"
           "Settings:\n\n" + "\n\n".join(describe(CoordinatorSettings, ENV_PREFIX).splitlines()))


def _help(name: str) -> str:
    for f in dataclasses.fields(CoordinatorSettings):
        if f.name == name:
            default = f.default if f.default is not dataclasses.MISSING else f.default_factory()  # type: ignore[misc]
            env = env_name(ENV_PREFIX, name, f.metadata.get("env"))
            shown = "(hidden)" if name.endswith("token") else repr(default)
            return f"{f.metadata['help']} [default: {shown}; env {env}]"
    raise KeyError(name)


def _options(func):  # type: ignore[no-untyped-def]
    for f in reversed(dataclasses.fields(CoordinatorSettings)):
        flag = "--" + f.name.replace("_", "-")
        if f.name == "id":
            func = click.option(flag, "id_", default=None, help=_help(f.name))(func)
        elif f.name in ("expect_node", "node_token"):
            func = click.option(flag, multiple=True, help=_help(f.name))(func)
        else:
            func = click.option(flag, default=None, help=_help(f.name))(func)
    return func


@click.command("coordinator", epilog=_EPILOG, context_settings={"max_content_width": 110})
@click.option("--config", "config_file", type=click.Path(path_type=Path), default=None,
              help="TOML file whose [coordinator] table holds settings (flags and environment win).")
@_options
def coordinator_command(config_file: Path | None, id_: str | None, **flags: object) -> None:
    """Run a coordinator: accept the nodes' filter sync streams, keep a bit-sliced replica of every
    node's Bloom filter, answer Locate/Read/Write/Remove by probing only the candidate nodes, count
    wasted probes, and ask saturated nodes to rebuild their filters.

    Reports gRPC health SERVING once listening. Stops cleanly on SIGTERM or SIGINT.
    """
    flags["id"] = id_
    try:
        settings = load_settings(CoordinatorSettings, config_file=config_file, section=SECTION,
                                 env_prefix=ENV_PREFIX, overrides=flags)
    except ConfigError as exc:
        click.echo(f"shardsieve coordinator: {exc}", err=True)
        sys.exit(2)
    from coordinator.daemon import run

    sys.exit(run(settings))
