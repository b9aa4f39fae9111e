"""`shardsieve agent` (run an agent) and `shardsieve agent-retire` (remove what it left in its store).

An agent keeps the filter of a Redis database or a PostgreSQL table it does not own and
speaks to coordinators as any node does (docs/agents.md). Its settings are the node's shared
settings (node/settings.py, ServingSettings: TLS, tokens, push interval, heartbeats, limits,
metrics port, logs) plus the store's, read the same way: flags > SHARDSIEVE_AGENT_*
environment > the [agent] table of --config > defaults. The options are made from the
settings class, so --help always lists every setting with its default and variable.
"""

from __future__ import annotations

import dataclasses
import sys
import typing
from pathlib import Path
from typing import Any, Callable

import click

from shardsieve.config import ConfigError, load_settings
from shardsieve.node.cli import setting_help
from shardsieve.node.settings import AGENT_ENV_PREFIX, AGENT_SECTION, AgentSettings

# The store's settings first, then the shared ones in their declared order.
_FIRST = ("id", "store", "ledger", "state_dir", "configure_notifications", "store_password_file", "write_timeout_ms")
_METAVARS = {"id": "ID", "store": "URL", "ledger": "memory|sqlite", "state_dir": "DIR", "listen": "HOST:PORT",
             "advertise": "HOST:PORT", "coordinator": "HOST:PORT", "fpr": "P", "log_level": "LEVEL",
             "log_format": "json|text", "sync_token": "TOKEN", "token": "TOKEN"}

_EPILOG = ("Every setting can also come from the [agent] table of the --config TOML file (keys are the option "
           "names without the leading dashes, e.g. push-interval-ms = 20) or from the environment variable shown "
           "with each option; flags win over the environment, which wins over the file, which wins over the "
           "default. The shared settings mean what they mean for `shardsieve node`.\n\n"
           "Until the store is listed the agent answers health NOT_SERVING and opens no sync stream; after a "
           "break of the store's change feed it holds its sync streams (coordinators list it as stale) until "
           "the store is listed again, then rebuilds its filter under a new epoch (docs/agents.md).\n\n"
           "Exit codes: 0 clean stop; 1 cannot start or failed while serving; 2 invalid setting; 3 listen "
           "address taken; 4 the store cannot be watched (unreachable or not set up; the line says what to "
           "change).")


def _metavar(f: dataclasses.Field) -> str:  # type: ignore[type-arg]
    if f.name in _METAVARS:
        return _METAVARS[f.name]
    hint = typing.get_type_hints(AgentSettings)[f.name]
    base = next((a for a in typing.get_args(hint) if a is not type(None)), hint)
    if base is bool:
        return "true|false"
    if base is int:
        return "N"
    if base is Path:
        return "FILE"
    return "TEXT"


def _options(command: Callable[..., Any]) -> Callable[..., Any]:
    """One option per setting of AgentSettings (values are text; load_settings converts them)."""
    fields = {f.name: f for f in dataclasses.fields(AgentSettings)}
    order = [*_FIRST, *(name for name in fields if name not in _FIRST)]
    for name in reversed(order):
        f = fields[name]
        flag = "--" + name.replace("_", "-")
        command = click.option(flag, name, default=None, multiple=name == "coordinator", metavar=_metavar(f),
                               help=setting_help(AgentSettings, AGENT_ENV_PREFIX, name))(command)
    return click.option("--config", "config_file", type=click.Path(path_type=Path), default=None,
                        help="TOML file whose [agent] table holds settings (flags and environment win).")(command)


@click.command("agent", epilog=_EPILOG, context_settings={"max_content_width": 110})
@_options
def agent_command(config_file: Path | None, **flags: object) -> None:
    """Attach to a Redis database or a PostgreSQL table and keep the counting Bloom filter of its
    keys, streamed to every coordinator like a storage node's.

    Writes routed through a coordinator go to the store and are acknowledged once its change feed
    brought them into the filter; probes read the store. Stops cleanly on SIGTERM or SIGINT.
    """
    try:
        settings = load_settings(AgentSettings, config_file=config_file, section=AGENT_SECTION,
                                 env_prefix=AGENT_ENV_PREFIX, overrides=flags)
    except ConfigError as exc:
        click.echo(f"shardsieve agent: {exc}", err=True)
        sys.exit(2)
    from shardsieve.node.agent_daemon import run

    sys.exit(run(settings))


# --------------------------------------------------------------------------- agent-retire
RETIRE_WARNING = ("an agent still running with this id loses its stream and lists the whole table again when it "
                  "reconnects")


def _fmt_bytes(n: int | None) -> str:
    if n is None:
        return "unknown"
    for unit in ("B", "KiB", "MiB", "GiB"):
        if n < 1024 or unit == "GiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024   # type: ignore[assignment]
    return f"{n} B"


@click.command("agent-retire", context_settings={"max_content_width": 110})
@click.option("--store", "store", required=True, metavar="URL",
              help="The store the agent watched, as given to `shardsieve agent --store`.")
@click.option("--id", "node_id", required=True, metavar="ID", help="The agent's node id.")
@click.option("--yes", is_flag=True, help="Do not ask for confirmation (required when not run at a terminal).")
def agent_retire_command(store: str, node_id: str, yes: bool) -> None:
    """Remove what a retired agent left in its store: for PostgreSQL, the agent's replication
    slots (which keep WAL from being recycled for as long as they exist) and its publication.
    A Redis agent leaves nothing in the store.

    Exit codes: 0 done (or nothing to remove); 1 the store could not be reached or refused;
    2 invalid input, or no --yes when not run at a terminal; nothing is removed then.
    """
    from shardsieve.limits import node_id_problem
    from shardsieve.node.settings import store_kind

    def fail(message: str, code: int) -> None:
        click.echo(f"shardsieve agent-retire: {message}", err=True)
        sys.exit(code)

    try:
        kind = store_kind(store)
    except ConfigError as exc:
        fail(str(exc).replace("setting 'store'", "--store"), 2)
    problem = node_id_problem(node_id)
    if problem:
        fail(f"--id: {problem}", 2)
    if kind == "redis":
        click.echo(f"a Redis agent leaves nothing in the store; nothing to remove for {node_id} "
                   f"(notify-keyspace-events stays as it is)")
        return
    try:
        import psycopg2

        from shardsieve.node.adapters.postgres_store import agent_leftovers, agent_slot_base, drop_agent_slots
    except ImportError as exc:
        fail(f"the store drivers are not installed ({exc}); pip install 'shardsieve[agents]'", 1)
    try:
        slots, publication = agent_leftovers(store, node_id)
    except psycopg2.Error as exc:
        fail(f"cannot read the replication slots: {str(exc).strip()}", 1)
    if not slots and not publication:
        click.echo(f"agent {node_id} left no replication slot and no publication; nothing to remove")
        return
    what = [f"slot {s.name} ({'in use' if s.active else 'idle'}, holding {_fmt_bytes(s.held_wal_bytes)} of WAL)"
            for s in slots] + ([f"publication {agent_slot_base(node_id)}"] if publication else [])
    if not yes:
        if not sys.stdin.isatty():
            fail(f"removing {', '.join(what)} needs --yes when not run at a terminal: {RETIRE_WARNING}", 2)
        if not click.confirm(f"Remove {', '.join(what)}? {RETIRE_WARNING[0].upper()}{RETIRE_WARNING[1:]}.",
                             default=False, err=True):
            fail("not confirmed; nothing removed", 1)
    try:
        dropped = drop_agent_slots(store, node_id)
    except (psycopg2.Error, RuntimeError) as exc:
        fail(f"could not remove everything: {str(exc).strip()}", 1)
    click.echo(f"removed {', '.join(dropped)}")
