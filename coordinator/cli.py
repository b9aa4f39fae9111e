"""`shardsieve coordinator`: run a coordinator (filter replicas, routing, reads/writes, accounting, rebuilds)."""

from __future__ import annotations

import dataclasses
import sys
from pathlib import Path

import click

from shardsieve.coordinator.settings import ENV_PREFIX, SECTION, CoordinatorSettings
from shardsieve.config import ConfigError, env_name, load_settings

_EPILOG = ("Every setting can also come from the [coordinator] table of the --config TOML file (keys are "
           "the option names without the leading dashes, e.g. growth = 3.0) or from the environment "
           "variable shown with each option; flags win over the environment, which wins over the file, "
           "which wins over the default. List settings (expect-node, node-token) take a comma-separated "
           "list in the environment. Prefer the *-file settings for tokens: flags show in `ps`.")

# metavars by name, then by type (click would print TEXT for every option)
_METAVARS = {"id": "ID", "listen": "HOST:PORT", "metrics_port": "PORT", "state_dir": "DIR",
             "expect_node": "NODE_ID=HOST:PORT", "node_token": "NODE_ID=TOKEN", "mode": "safe|fast",
             "target_fpr": "P", "log_level": "LEVEL", "log_format": "json|text"}


def _metavar(f: dataclasses.Field) -> str:  # type: ignore[type-arg]
    if f.name in _METAVARS:
        return _METAVARS[f.name]
    if f.name.endswith("_file") or f.name.startswith("tls_") and f.name != "tls_client_auth":
        return "FILE"
    if f.name.endswith("token"):
        return "TOKEN"
    if f.name.endswith("_s"):
        return "SECONDS"
    if f.type in (bool, "bool"):
        return "true|false"
    if f.type in (float, "float"):
        return "X"
    return "N"


def _shown(name: str, default: object) -> str:
    """How --help shows a default: never a token's value, booleans as typed on the command line."""
    if name.endswith("token"):
        return "(hidden)"
    if isinstance(default, bool):
        return str(default).lower()
    if isinstance(default, list) or default is None:
        return "none"
    if isinstance(default, str):
        return repr(default) if default else "empty"
    return str(default)


def _help(name: str) -> str:
    for f in dataclasses.fields(CoordinatorSettings):
        if f.name == name:
            default = f.default if f.default is not dataclasses.MISSING else f.default_factory()  # type: ignore[misc]
            env = env_name(ENV_PREFIX, name, f.metadata.get("env"))
            return f"{f.metadata['help']} [default: {_shown(name, default)}; env {env}]"
    raise KeyError(name)


def _options(func):  # type: ignore[no-untyped-def]
    for f in reversed(dataclasses.fields(CoordinatorSettings)):
        flag = "--" + f.name.replace("_", "-")
        if f.name == "id":
            func = click.option(flag, "id_", default=None, metavar=_metavar(f), help=_help(f.name))(func)
        elif f.name in ("expect_node", "node_token"):
            func = click.option(flag, multiple=True, metavar=_metavar(f), help=_help(f.name))(func)
        else:
            func = click.option(flag, default=None, metavar=_metavar(f), help=_help(f.name))(func)
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
    from shardsieve.coordinator.daemon import run

    sys.exit(run(settings))
