"""`shardsieve node`: run one storage node (store + counting filter + sync streams to coordinators)."""

from __future__ import annotations

import sys
from pathlib import Path

import click

from shardsieve.node.settings import ENV_PREFIX, SECTION, NodeSettings
from shardsieve.config import ConfigError, load_settings

_EPILOG = ("Every setting can also come from the [node] table of the --config TOML file (keys are the "
           "option names without the leading dashes, e.g. push-interval-ms = 20) or from the environment "
           "variable shown with each option; flags win over the environment, which wins over the file, "
           "which wins over the default.\n\n"
           "Durability: with sync-level 'full' (default) a write is acknowledged only after SQLite "
           "fsynced its write-ahead log, so it survives a process kill and a power loss or OS crash; "
           "'normal' survives a process kill but may lose the last acknowledged writes on power loss. "
           "The list setting coordinator takes a comma-separated list in the environment. Prefer the "
           "*-file settings for tokens: flags show in `ps`.")


def setting_help(cls: type, env_prefix: str, name: str) -> str:
    """The --help text of one setting: its help, default (never a token's) and variable."""
    import dataclasses

    for f in dataclasses.fields(cls):
        if f.name == name:
            default = f.default if f.default is not dataclasses.MISSING else f.default_factory()  # type: ignore[misc]
            env = f"{env_prefix}{name.upper()}"
            if isinstance(default, list):
                shown = ", ".join(default) or "none"
            elif name.endswith("token"):
                shown = "(hidden)"
            elif isinstance(default, bool):
                shown = str(default).lower()          # as typed on the command line: true|false
            elif default is None:
                shown = "none"
            elif isinstance(default, str):
                shown = repr(default) if default else "empty"
            else:
                shown = str(default)
            return f"{f.metadata['help']} [default: {shown}; env {env}]"
    raise KeyError(name)


def _help(name: str) -> str:
    return setting_help(NodeSettings, ENV_PREFIX, name)


@click.command("node", epilog=_EPILOG, context_settings={"max_content_width": 110})
@click.option("--config", "config_file", type=click.Path(path_type=Path), default=None,
              help="TOML file whose [node] table holds settings (flags and environment win).")
@click.option("--id", "id_", default=None, metavar="ID", help=_help("id"))
@click.option("--listen", default=None, metavar="HOST:PORT", help=_help("listen"))
@click.option("--advertise", default=None, metavar="HOST:PORT", help=_help("advertise"))
@click.option("--data", default=None, metavar="DIR", help=_help("data"))
@click.option("--coordinator", multiple=True, metavar="HOST:PORT", help=_help("coordinator"))
@click.option("--capacity", default=None, metavar="N", help=_help("capacity"))
@click.option("--fpr", default=None, metavar="P", help=_help("fpr"))
@click.option("--seed", default=None, metavar="N", help=_help("seed"))
@click.option("--metrics-port", default=None, metavar="N", help=_help("metrics_port"))
@click.option("--push-interval-ms", default=None, metavar="N", help=_help("push_interval_ms"))
@click.option("--push-threshold", default=None, metavar="N", help=_help("push_threshold"))
@click.option("--heartbeat-ms", default=None, metavar="N", help=_help("heartbeat_ms"))
@click.option("--sync-level", default=None, metavar="full|normal", help=_help("sync_level"))
@click.option("--store", default=None, metavar="sqlite|memory", help=_help("store"))
@click.option("--max-key-bytes", default=None, metavar="N", help=_help("max_key_bytes"))
@click.option("--max-value-bytes", default=None, metavar="N", help=_help("max_value_bytes"))
@click.option("--max-batch", default=None, metavar="N", help=_help("max_batch"))
@click.option("--scan-batch", default=None, metavar="N", help=_help("scan_batch"))
@click.option("--history-limit", default=None, metavar="N", help=_help("history_limit"))
@click.option("--reconnect-min-ms", default=None, metavar="N", help=_help("reconnect_min_ms"))
@click.option("--reconnect-max-ms", default=None, metavar="N", help=_help("reconnect_max_ms"))
@click.option("--log-level", default=None, metavar="LEVEL", help=_help("log_level"))
@click.option("--log-format", default=None, metavar="json|text", help=_help("log_format"))
@click.option("--read-threads", default=None, metavar="N", help=_help("read_threads"))
@click.option("--tls-cert", default=None, metavar="FILE", help=_help("tls_cert"))
@click.option("--tls-key", default=None, metavar="FILE", help=_help("tls_key"))
@click.option("--tls-ca", default=None, metavar="FILE", help=_help("tls_ca"))
@click.option("--tls-client-auth", default=None, metavar="true|false", help=_help("tls_client_auth"))
@click.option("--allow-plaintext", default=None, metavar="true|false", help=_help("allow_plaintext"))
@click.option("--sync-token", default=None, metavar="TOKEN", help=_help("sync_token"))
@click.option("--sync-token-file", default=None, metavar="FILE", help=_help("sync_token_file"))
@click.option("--token", default=None, metavar="TOKEN", help=_help("token"))
@click.option("--token-file", default=None, metavar="FILE", help=_help("token_file"))
def node_command(config_file: Path | None, id_: str | None, **flags: object) -> None:
    """Run a storage node: serve puts/gets/deletes from a durable SQLite store, keep a counting
    Bloom filter of its keys exact, and stream the filter's changes to every coordinator.

    Reports gRPC health NOT_SERVING until the filter has been rebuilt from the store, then
    SERVING. Stops cleanly on SIGTERM or SIGINT.
    """
    flags["id"] = id_
    try:
        settings = load_settings(NodeSettings, config_file=config_file, section=SECTION,
                                 env_prefix=ENV_PREFIX, overrides=flags)
    except ConfigError as exc:
        click.echo(f"shardsieve node: {exc}", err=True)
        sys.exit(2)
    from shardsieve.node.daemon import run

    sys.exit(run(settings))
