"""Operator commands: status, inspect, rebuild, locate, get, put, delete, policy, unlist.

Every command takes --coordinator / --token / --config / --timeout / --json. Output is a rich
table for people and a JSON document (stdout) for scripts. Any failure prints ONE line on stderr
("Error: what happened: what to do") and exits with the code documented in docs/cli.md.
"""

from __future__ import annotations

import functools
import json
import math
import os
import sys
import time
from typing import Any, Callable, Iterable, TypeVar

import click
from google.protobuf.message import Message
from rich.console import Console
from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from shardsieve.client import (
    EXIT_FAILURE, EXIT_INVALID, EXIT_NOT_FOUND, EXIT_USAGE, ClientError, OperatorClient, resolve_settings,
)
from shardsieve.limits import node_id_problem

F = TypeVar("F", bound=Callable[..., Any])

# No filter of at most 2^40 bits (the largest geometry, shardsieve/geometry.py) holds more keys.
MAX_CAPACITY = 1 << 40


# ---------------------------------------------------------------------------------------------
# One-line failures
# ---------------------------------------------------------------------------------------------
class CliFailure(click.ClickException):
    """A ClickException carrying our exit code; click prints it as the single line 'Error: ...'."""

    def __init__(self, message: str, exit_code: int = EXIT_FAILURE) -> None:
        super().__init__(" ".join(message.split()))
        self.exit_code = exit_code


def _one_line_usage(ctx: click.Context, exc: click.UsageError) -> CliFailure:
    return CliFailure(f"{exc.format_message()} (see `{ctx.command_path} --help`)", EXIT_USAGE)


# Arguments taken as raw bytes: a KEY or VALUE typed in a non-UTF-8 locale keeps its bytes.
BYTE_PARAMS = frozenset({"key", "value"})


def _undecodable(value: Any) -> bool:
    """Whether a command-line string holds bytes that were not UTF-8: Python keeps them as lone
    surrogates (PEP 383, "surrogateescape"), which no protobuf string field accepts."""
    values = value if isinstance(value, (tuple, list)) else (value,)
    for v in values:
        if isinstance(v, str):
            try:
                v.encode("utf-8")
            except UnicodeEncodeError:
                return True
    return False


def check_utf8_params(ctx: click.Context) -> None:
    """Refuse (exit 2) a text argument that is not UTF-8, naming it; KEY and VALUE are bytes."""
    for name, value in ctx.params.items():
        if name not in BYTE_PARAMS and _undecodable(value):
            flag = "--" + name.replace("_", "-") if any(
                p.name == name and isinstance(p, click.Option) for p in ctx.command.params) else name.upper()
            raise CliFailure(f"{flag} is not valid UTF-8 text ({value!r}): node ids, names and addresses are "
                             f"text; give it in UTF-8 (see `{ctx.command_path} --help`)", EXIT_USAGE)


class OneLineCommand(click.Command):
    """A click command whose usage errors are one line too (no usage block), and whose text
    arguments must be UTF-8."""

    def parse_args(self, ctx: click.Context, args: list[str]) -> list[str]:
        try:
            rest = super().parse_args(ctx, args)
        except click.UsageError as exc:
            raise _one_line_usage(ctx, exc) from None
        check_utf8_params(ctx)
        return rest


class OneLineGroup(click.Group):
    command_class = OneLineCommand

    def parse_args(self, ctx: click.Context, args: list[str]) -> list[str]:
        try:
            return super().parse_args(ctx, args)
        except click.UsageError as exc:
            raise _one_line_usage(ctx, exc) from None

    def resolve_command(self, ctx: click.Context, args: list[str]):  # type: ignore[override]
        try:
            return super().resolve_command(ctx, args)
        except click.UsageError as exc:
            raise _one_line_usage(ctx, exc) from None


def guarded(func: F) -> F:
    """Turn ClientError (and anything unexpected) into a one-line CliFailure with its exit code."""

    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return func(*args, **kwargs)
        except ClientError as exc:
            raise CliFailure(exc.message, exc.exit_code) from None
        except (click.ClickException, click.exceptions.Exit, click.Abort):
            raise
        except KeyboardInterrupt:
            raise CliFailure("interrupted", 130) from None
        except Exception as exc:  # noqa: BLE001 - the operator gets one line, never a traceback
            if os.environ.get("SHARDSIEVE_DEBUG"):
                raise
            raise CliFailure(f"unexpected {type(exc).__name__}: {exc} (rerun with SHARDSIEVE_DEBUG=1 "
                             f"for a traceback and report it)", EXIT_FAILURE) from None

    return wrapper  # type: ignore[return-value]


def coordinator_options(func: F) -> F:
    """--coordinator/--token/--config/--timeout/--json on a command."""
    func = click.option("--json", "as_json", is_flag=True, help="Print a JSON document for scripts.")(func)
    func = click.option("--timeout", "timeout_s", type=click.FloatRange(min=0, min_open=True), default=None,
                        metavar="SECONDS", help="Deadline per call in seconds (env SHARDSIEVE_TIMEOUT_S; default 10).")(func)
    func = click.option("--config", "config_file", type=click.Path(dir_okay=False), default=None,
                        help="TOML file with a [cli] table (env SHARDSIEVE_CONFIG; default "
                             "~/.config/shardsieve/config.toml when present).")(func)
    func = click.option("--token", default=None, metavar="TOKEN",
                        help="Bearer token for the coordinator (env SHARDSIEVE_TOKEN).")(func)
    for flag, env, what in (("--tls-key", "SHARDSIEVE_TLS_KEY", "PEM key of --tls-cert"),
                            ("--tls-cert", "SHARDSIEVE_TLS_CERT", "PEM client certificate (mutual TLS)"),
                            ("--tls-ca", "SHARDSIEVE_TLS_CA", "PEM CA of the coordinator's certificate (TLS)")):
        # kept in the click context and handed to resolve_settings as environment (flags win over env)
        func = click.option(flag, default=None, metavar="FILE", expose_value=False, help=f"{what} (env {env}).",
                            callback=lambda c, _p, v, env=env: c.meta.setdefault("tls_env", {}).update(
                                {env: v} if v else {}))(func)
    func = click.option("--coordinator", default=None, metavar="HOST:PORT",
                        help="Coordinator address (env SHARDSIEVE_COORDINATOR; default 127.0.0.1:7400).")(func)
    return func


def open_client(coordinator: str | None, token: str | None, config_file: str | None,
                timeout_s: float | None) -> OperatorClient:
    ctx = click.get_current_context(silent=True)
    tls_env = ctx.meta.get("tls_env", {}) if ctx is not None else {}
    environ = {**os.environ, **tls_env} if tls_env else None
    return OperatorClient(resolve_settings(coordinator, token, config_file, timeout_s, environ=environ))


def emit_json(data: Any) -> None:
    """Strict JSON on stdout (non-finite numbers become null)."""
    click.echo(json.dumps(_finite(data), indent=2, default=str, allow_nan=False))


def _finite(data: Any) -> Any:
    if isinstance(data, float):
        return data if math.isfinite(data) else None
    if isinstance(data, dict):
        return {k: _finite(v) for k, v in data.items()}
    if isinstance(data, (list, tuple)):
        return [_finite(v) for v in data]
    return data


def message_to_dict(msg: Message) -> dict[str, Any]:
    """Protobuf message -> plain dict with every field present and integers kept as numbers
    (json_format would render 64-bit integers as strings)."""
    out: dict[str, Any] = {}
    for field in msg.DESCRIPTOR.fields:
        value = getattr(msg, field.name)
        if field.message_type is not None and field.message_type.GetOptions().map_entry:
            out[field.name] = {k: (message_to_dict(v) if isinstance(v, Message) else v) for k, v in value.items()}
        elif _is_repeated(field):
            out[field.name] = [message_to_dict(v) if isinstance(v, Message) else _scalar(field, v) for v in value]
        elif field.message_type is not None:
            out[field.name] = message_to_dict(value)
        else:
            out[field.name] = _scalar(field, value)
    return out


def _is_repeated(field: Any) -> bool:
    flag = getattr(field, "is_repeated", None)
    if flag is not None:
        return bool(flag)
    return field.label == field.LABEL_REPEATED


def _scalar(field: Any, value: Any) -> Any:
    if field.enum_type is not None:
        enum_value = field.enum_type.values_by_number.get(value)
        return enum_value.name if enum_value is not None else value
    if isinstance(value, bytes):
        return value.decode("utf-8", "backslashreplace")
    return value


# ---------------------------------------------------------------------------------------------
# Formatting helpers
# ---------------------------------------------------------------------------------------------
def fmt_rate(p: float) -> str:
    """A rate in one format whatever its size (rates span 1e-9 .. 1): scientific, 3 digits."""
    return f"{p:.2e}"


def fmt_lag(ms: float) -> str:
    if ms < 1000:
        return f"{ms:.0f} ms"
    if ms < 120_000:
        return f"{ms / 1000:.1f} s"
    return f"{ms / 60000:.1f} min"


def fmt_count(n: int) -> str:
    return f"{n:,}"


def geometry_text(g: Any) -> str:
    if not g.bits:
        return "-"
    return f"m={g.bits:,} k={g.hashes}"


def check_node_ids(*node_ids: str) -> None:
    """Refuse (exit 6, before any call) an id outside the node id alphabet (docs/node.md,
    "Node ids"): no node can have it, so asking the coordinator could only fail."""
    for node_id in node_ids:
        problem = node_id_problem(node_id)
        if problem:
            raise CliFailure(f"{problem}: give the node id as `shardsieve status` lists it", EXIT_INVALID)


def decode_key(key: str, hex_input: bool) -> bytes:
    """The bytes of KEY/VALUE as typed: UTF-8 text, or in a non-UTF-8 locale the raw bytes
    (surrogateescape restores them, PEP 383), or hexadecimal with --hex."""
    if not hex_input:
        return key.encode("utf-8", "surrogateescape")
    try:
        return bytes.fromhex(key)
    except ValueError:
        raise ClientError(f"{key!r} is not hexadecimal: give pairs of 0-9a-f digits or drop --hex",
                          EXIT_INVALID) from None


def show_bytes(b: bytes) -> str:
    try:
        return b.decode("utf-8")
    except UnicodeDecodeError:
        return "0x" + b.hex()


def console(stderr: bool = False) -> Console:
    """Rich console; when output is not a terminal (pipes, files) tables get 160 columns, not 80."""
    out = Console(highlight=False, stderr=stderr)
    if not out.is_terminal and "COLUMNS" not in os.environ:
        out = Console(highlight=False, stderr=stderr, width=160)
    return out


def state_text(n: Any) -> str:
    parts = [n.state or ("disconnected" if not n.connected else "?")]
    if n.saturated:
        parts.append("SATURATED")
    if n.implausible_fill:
        parts.append("IMPLAUSIBLE-FILL")
    if n.stale and "stale" not in parts[0]:
        parts.append("STALE")
    return " ".join(parts)


def row_style(n: Any) -> str | None:
    """Implausible fill first: a rebuild does not cure a filter the node's key count cannot explain."""
    if n.implausible_fill:
        return "bold magenta"
    if n.saturated:
        return "bold red"
    if n.stale or not n.connected:
        return "yellow"
    return None


# ---------------------------------------------------------------------------------------------
# status / inspect
# ---------------------------------------------------------------------------------------------
@click.command(cls=OneLineCommand)
@coordinator_options
@guarded
def status(coordinator: str | None, token: str | None, config_file: str | None, timeout_s: float | None,
           as_json: bool) -> None:
    """Fleet table: every node's keys, fill, predicted and observed FPR, lag and state.

    Nodes whose filter fill is implausible for their key count are shown in magenta, saturated
    ones in red, stale or disconnected ones in yellow.
    """
    with open_client(coordinator, token, config_file, timeout_s) as client:
        reply = client.fleet_status()
    if as_json:
        emit_json(message_to_dict(reply))
        return
    out = console()
    count = len(reply.nodes)
    table = Table(title=f"fleet seen by {reply.coordinator_id or 'a coordinator'} at {client.address} · "
                        f"{reply.mode or '?'} mode · {count} node{'' if count == 1 else 's'}")
    for col, justify in (("node", "left"), ("address", "left"), ("keys", "right"), ("capacity", "right"),
                         ("fill", "right"), ("predicted FPR", "right"), ("observed FPR", "right"),
                         ("lag", "right"), ("state", "left")):
        table.add_column(col, justify=justify)  # type: ignore[arg-type]
    for n in sorted(reply.nodes, key=lambda n: n.node_id):
        observed = fmt_rate(n.observed_fpr) if n.lookups_checked else ""   # blank: nothing measured yet
        table.add_row(n.node_id, n.address, fmt_count(n.key_count), fmt_count(n.capacity), f"{n.fill:.1%}",
                      fmt_rate(n.predicted_fpr), observed, fmt_lag(n.lag_ms), state_text(n), style=row_style(n))
    out.print(table)
    if any(not n.lookups_checked for n in reply.nodes):
        out.print("[dim]observed FPR is blank for a node no lookup has been checked against yet[/]")
    iv = reply.observed_fpr_interval
    out.print(f"lookups {fmt_count(reply.lookups)} · probes {fmt_count(reply.probes)} · wasted "
              f"{fmt_count(reply.wasted_probes)} · avoided fan-out {reply.avoided_fanout:.1%} · observed FPR "
              f"{fmt_rate(reply.observed_fpr)} (Wilson 95%: {fmt_rate(iv.low)}..{fmt_rate(iv.high)}) · "
              f"rebuilds in progress {reply.rebuilds_in_progress}")
    flagged = [n.node_id for n in reply.nodes if n.saturated]
    stale = [n.node_id for n in reply.nodes if n.stale or not n.connected]
    if flagged:
        out.print(f"[bold red]saturated:[/] {', '.join(sorted(flagged))} — `shardsieve rebuild --flagged` "
                  f"rebuilds them")
    if stale:
        out.print(f"[yellow]stale or disconnected:[/] {', '.join(sorted(stale))}")
    implausible = [n.node_id for n in reply.nodes if n.implausible_fill]
    if implausible:
        out.print(f"[bold magenta]implausible fill:[/] {', '.join(sorted(implausible))} — more (or fewer) bits "
                  f"set than the node's key count explains; check the node (`shardsieve inspect NODE`, "
                  f"docs/security.md)")


@click.command(cls=OneLineCommand)
@click.argument("node")
@coordinator_options
@guarded
def inspect_node(node: str, coordinator: str | None, token: str | None, config_file: str | None,
                 timeout_s: float | None, as_json: bool) -> None:
    """Everything the coordinator knows about NODE, and its recent policy decisions."""
    check_node_ids(node)
    with open_client(coordinator, token, config_file, timeout_s) as client:
        reply = client.node_detail(node)
    if as_json:
        emit_json(message_to_dict(reply))
        return
    n = reply.status
    out = console()
    table = Table(title=f"node {n.node_id}", show_header=False)
    table.add_column("field", style="bold")
    table.add_column("value")
    iv = n.observed_fpr_interval
    rows = [
        ("address", n.address),
        ("state", state_text(n)),
        ("connected", "yes" if n.connected else "no"),
        ("geometry", geometry_text(n.geometry)),
        ("epoch / sequence", f"{n.epoch} / {n.sequence}"),
        ("keys / capacity", f"{fmt_count(n.key_count)} / {fmt_count(n.capacity)}"),
        ("fill", f"{n.fill:.2%}" + ("  (implausible for its key count)" if n.implausible_fill else "")),
        ("predicted FPR", fmt_rate(n.predicted_fpr)),
        ("observed FPR", (f"{fmt_rate(n.observed_fpr)} (Wilson 95%: {fmt_rate(iv.low)}..{fmt_rate(iv.high)}; "
                          f"{fmt_count(n.lookups_checked)} lookups checked)") if n.lookups_checked
                         else "not measured yet (no lookup checked against this node)"),
        ("probes / wasted", f"{fmt_count(n.probes)} / {fmt_count(n.wasted_probes)}"),
        ("reads the node answered not-found", fmt_count(n.reads_missed_reported)),
        ("lag", fmt_lag(n.lag_ms)),
        ("saturation", ", ".join(n.saturation_reasons) if n.saturated else "no"),
        ("rebuild", f"{n.rebuild_phase} {n.rebuild_progress:.0%}" if n.rebuild_phase else "idle"),
        ("delta bytes / snapshots", f"{fmt_count(n.delta_bytes)} / {n.snapshots}"),
    ]
    for k, v in rows:
        table.add_row(k, v)
    out.print(table)
    if reply.recent_decisions:
        dt = Table(title="recent decisions")
        for col in ("when (UTC)", "action", "detail"):
            dt.add_column(col)
        for d in reply.recent_decisions:
            dt.add_row(time.strftime("%Y-%m-%d %H:%M:%S", time.gmtime(d.at_unix)), d.action, d.detail)
        out.print(dt)


# ---------------------------------------------------------------------------------------------
# rebuild
# ---------------------------------------------------------------------------------------------
def wait_for_rebuilds(client: OperatorClient, before: dict[str, int], queued: list[str], timeout_s: float,
                      show_progress: bool, bits_before: dict[str, int] | None = None,
                      planned_bits: dict[str, int] | None = None) -> dict[str, dict[str, Any]]:
    """Poll FleetStatus until every node in `before` has a higher epoch and is not rebuilding.
    Queued ones (over the concurrent-rebuild limit) are started by the coordinator as slots
    free up; they show as queued until their node reports a rebuild phase."""
    deadline = time.monotonic() + timeout_s
    results: dict[str, dict[str, Any]] = {}
    queued = list(queued)
    bits_before, planned_bits = bits_before or {}, planned_bits or {}
    progress = Progress(TextColumn("{task.description}"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"),
                        TextColumn("{task.fields[phase]}"), TimeElapsedColumn(),
                        console=console(stderr=True), disable=not show_progress, transient=False)
    with progress:
        tasks = {nid: progress.add_task(f"rebuild {nid}", total=1.0, phase="queued" if nid in queued else "started")
                 for nid in before}
        while True:
            reply = client.fleet_status()
            nodes = {n.node_id: n for n in reply.nodes}
            for nid, epoch0 in before.items():
                n = nodes.get(nid)
                if n is None:
                    raise ClientError(f"node {nid} left the fleet during its rebuild: check `shardsieve status`",
                                      EXIT_FAILURE)
                if nid in queued and (n.rebuild_phase or n.epoch > epoch0):
                    queued.remove(nid)          # the coordinator started it
                done = n.epoch > epoch0 and n.state != "rebuilding"
                if done and nid not in results:
                    # a new epoch at the old size, after asking for another: the node gave it up
                    given_up = planned_bits.get(nid, 0) not in (0, bits_before.get(nid, 0)) \
                        and n.geometry.bits == bits_before.get(nid)
                    results[nid] = {"node_id": nid, "epoch_before": epoch0, "epoch_after": n.epoch,
                                    "capacity": n.capacity, "fill": n.fill, "predicted_fpr": n.predicted_fpr,
                                    "geometry": message_to_dict(n.geometry), "given_up": given_up}
                progress.update(tasks[nid], completed=1.0 if done else min(0.99, n.rebuild_progress),
                                phase=("given up" if results[nid]["given_up"] else "swapped") if done
                                else "queued" if nid in queued
                                else (n.rebuild_phase or n.state or "started"))
            if len(results) == len(before):
                return results
            if time.monotonic() > deadline:
                waiting = sorted(set(before) - set(results))
                raise ClientError(f"rebuild of {', '.join(waiting)} did not finish within {timeout_s:.0f}s; started "
                                  f"ones continue in the background: follow them with `shardsieve status`",
                                  EXIT_FAILURE)
            time.sleep(0.2)


def _fail_given_up(results: dict[str, dict[str, Any]]) -> None:
    """--wait: a rebuild the node gave up (a new epoch at its old size) is a failure, not a success."""
    given_up = sorted(nid for nid, r in results.items() if r["given_up"])
    if given_up:
        raise ClientError(f"the rebuild of {', '.join(given_up)} was given up by the node, which keeps its old "
                          "filter: `shardsieve inspect NODE` shows the decision, the node's log says why (e.g. a "
                          "coordinator refusing that size)", EXIT_FAILURE)


@click.command(cls=OneLineCommand, short_help="Replace nodes' filters with freshly sized ones.")
@click.argument("nodes", nargs=-1, metavar="[NODE]...")
@click.option("--flagged", is_flag=True, help="Rebuild every node the saturation monitor flagged.")
@click.option("--capacity", type=click.IntRange(min=1, max=MAX_CAPACITY), default=None,
              help="Keys to size the new filter for, 1..2^40 (default: the policy's growth x current keys).")
@click.option("--fpr", type=click.FloatRange(0, 1, min_open=True, max_open=True), default=None,
              help="Target false-positive rate of the new filter (default: the policy target).")
@click.option("--dry-run", is_flag=True, help="Show the plan (capacity, geometry, reason) and change nothing.")
@click.option("--wait", is_flag=True, help="Show progress until every new filter has replaced the old one.")
@click.option("--wait-timeout", type=click.FloatRange(min=0, min_open=True), default=300.0, show_default=True,
              help="Seconds --wait waits before giving up (the rebuild itself continues).")
@coordinator_options
@guarded
def rebuild(nodes: tuple[str, ...], flagged: bool, capacity: int | None, fpr: float | None, dry_run: bool,
            wait: bool, wait_timeout: float, coordinator: str | None, token: str | None, config_file: str | None,
            timeout_s: float | None, as_json: bool) -> None:
    """Replace the filters of NODE... (or of --flagged nodes) with freshly sized ones.

    The old filter keeps serving until the new one is complete and verified.
    """
    if not nodes and not flagged:
        raise ClientError("name the nodes to rebuild or pass --flagged (see `shardsieve rebuild --help`)",
                          EXIT_USAGE)
    if dry_run and wait:
        raise ClientError("--dry-run changes nothing, so there is nothing to --wait for: drop one of them",
                          EXIT_USAGE)
    check_node_ids(*nodes)
    with open_client(coordinator, token, config_file, timeout_s) as client:
        status = client.fleet_status().nodes if wait else []
        before = {n.node_id: n.epoch for n in status}
        bits_before = {n.node_id: n.geometry.bits for n in status}
        reply = client.rebuild(list(nodes), flagged=flagged, capacity=capacity or 0, target_fpr=fpr or 0.0,
                               dry_run=dry_run)
        plan = [message_to_dict(p) for p in reply.plan]
        results: dict[str, dict[str, Any]] = {}
        if wait and reply.plan:
            results = wait_for_rebuilds(client, {p.node_id: before.get(p.node_id, 0) for p in reply.plan},
                                        [p.node_id for p in reply.plan if p.queued], wait_timeout,
                                        show_progress=not as_json, bits_before=bits_before,
                                        planned_bits={p.node_id: p.geometry.bits for p in reply.plan})
    if as_json:
        emit_json({"dry_run": reply.dry_run, "plan": plan,
                   "completed": [results[k] for k in sorted(results)] if wait else None})
        _fail_given_up(results)
        return
    out = console()
    if not reply.plan:
        out.print("nothing to rebuild" + (" (no node is flagged)" if flagged else ""))
        return
    table = Table(title="rebuild plan (dry run: nothing changed)" if reply.dry_run else "rebuild started")
    for col in ("node", "capacity", "target FPR", "geometry", "filter bytes", "replica bytes after", "state",
                "reason"):
        table.add_column(col, justify="right" if "bytes" in col or col == "capacity" else "left")
    for p in reply.plan:
        state = f"refused: {p.refused}" if p.refused else "queued" if p.queued else "start"
        table.add_row(p.node_id, fmt_count(p.capacity), fmt_rate(p.target_fpr), geometry_text(p.geometry),
                      fmt_count(p.filter_bytes), fmt_count(p.replica_bytes_after), state, p.reason,
                      style="bold red" if p.refused else None)
    out.print(table)
    if any(p.refused for p in reply.plan):
        out.print("[bold red]refused plans would not start[/]: without --dry-run the whole request is refused "
                  "and nothing starts")
    for nid in sorted(results):
        r = results[nid]
        out.print(f"{nid}: epoch {r['epoch_before']} -> {r['epoch_after']}, capacity {fmt_count(r['capacity'])}, "
                  f"fill {r['fill']:.1%}, predicted FPR {fmt_rate(r['predicted_fpr'])}"
                  + (" — GIVEN UP by the node, old size kept" if r["given_up"] else ""))
    _fail_given_up(results)
    queued = [p.node_id for p in reply.plan if p.queued]
    if queued and not wait and not reply.dry_run:
        out.print(f"queued (over the policy's max_concurrent_rebuilds): {', '.join(queued)} — the coordinator "
                  f"starts them as rebuild slots free up")
    if not wait and not reply.dry_run:
        out.print("follow it with `shardsieve status` (or rerun with --wait)")


# ---------------------------------------------------------------------------------------------
# locate / get / put / delete
# ---------------------------------------------------------------------------------------------
hex_option = click.option("--hex", "hex_input", is_flag=True, help="KEY is given in hexadecimal (binary keys).")
hex_pair_option = click.option("--hex", "hex_input", is_flag=True,
                               help="KEY and VALUE are given in hexadecimal (binary keys and values).")


@click.command(cls=OneLineCommand)
@click.argument("key")
@hex_option
@coordinator_options
@guarded
def locate(key: str, hex_input: bool, coordinator: str | None, token: str | None, config_file: str | None,
           timeout_s: float | None, as_json: bool) -> None:
    """List the candidate nodes whose filters may hold KEY (no node is asked)."""
    k = decode_key(key, hex_input)
    with open_client(coordinator, token, config_file, timeout_s) as client:
        found = client.run("Locate", lambda: client.client.locate(k))
    cands = [{"node_id": c.node_id, "address": c.address, "stale": c.stale, "hinted": c.hinted} for c in found]
    if as_json:
        emit_json({"key": show_bytes(k), "candidates": cands})
        return
    out = console()
    if not cands:
        out.print(f"no node may hold {show_bytes(k)!r}: every filter rules it out")
        return
    out.print(f"candidates for {show_bytes(k)!r}:")
    table = Table()
    for col in ("node", "address", "why listed"):
        table.add_column(col)
    for c in found:
        why = "stale sync (safe mode)" if c.stale else ("recent write" if c.hinted else "filter match")
        table.add_row(c.node_id, c.address, why)
    out.print(table)


@click.command(cls=OneLineCommand)
@click.argument("key")
@hex_option
@coordinator_options
@guarded
def get(key: str, hex_input: bool, coordinator: str | None, token: str | None, config_file: str | None,
        timeout_s: float | None, as_json: bool) -> None:
    """Read KEY through the coordinator; print its value (exit 5 when no node holds it)."""
    k = decode_key(key, hex_input)
    with open_client(coordinator, token, config_file, timeout_s) as client:
        reply = client.run("Read", lambda: client.client.get(k))
    if as_json:
        emit_json({"key": show_bytes(k), "found": reply.found,
                   "value": show_bytes(reply.value) if reply.value is not None else None,
                   "value_hex": reply.value.hex() if reply.value is not None else None,
                   "node_id": reply.node_id, "probes": reply.candidates,
                   "wasted_probes": reply.wasted_probes, "candidates": reply.candidates})
        if not reply.found:
            sys.exit(EXIT_NOT_FOUND)
        return
    if reply.value is None:
        raise ClientError(f"{show_bytes(k)!r} is on no node ({reply.candidates} probes, {reply.candidates} "
                          f"candidates): check the key, or `shardsieve locate` it", EXIT_NOT_FOUND)
    click.echo(reply.value.hex() if hex_input else show_bytes(reply.value))


@click.command(cls=OneLineCommand)
@click.argument("key")
@click.argument("value")
@click.option("--node", "node_id", default="",
              help="Store on this node id (default: where the key is, else the coordinator places it). A key held "
                   "on another node is refused unless --move.")
@click.option("--move", is_flag=True, help="With --node: if the key is on another node, move it: write the new copy "
                                           "on --node, then delete the old one.")
@hex_pair_option
@coordinator_options
@guarded
def put(key: str, value: str, node_id: str, move: bool, hex_input: bool, coordinator: str | None, token: str | None,
        config_file: str | None, timeout_s: float | None, as_json: bool) -> None:
    """Store VALUE under KEY through the coordinator (routable at once: read-your-writes)."""
    if move and not node_id:
        raise ClientError("--move needs --node (the node to move the key to)", EXIT_USAGE)
    if node_id:
        check_node_ids(node_id)
    k = decode_key(key, hex_input)
    v = decode_key(value, hex_input)
    with open_client(coordinator, token, config_file, timeout_s) as client:
        reply = client.run("Write", lambda: client.client.put(k, v, node_id=node_id, move=move))
    if as_json:
        emit_json({"key": show_bytes(k), "node_id": reply.node_id, "created": reply.created, "epoch": reply.epoch,
                   "sequence": reply.sequence, "moved_from": list(reply.moved_from)})
        return
    moved = f"; moved from {', '.join(reply.moved_from)}" if reply.moved_from else ""
    console().print(f"{'created' if reply.created else 'overwrote'} {show_bytes(k)!r} on {reply.node_id} "
                    f"(epoch {reply.epoch}, sequence {reply.sequence}){moved}")


@click.command(cls=OneLineCommand)
@click.argument("key")
@hex_option
@coordinator_options
@guarded
def delete(key: str, hex_input: bool, coordinator: str | None, token: str | None, config_file: str | None,
           timeout_s: float | None, as_json: bool) -> None:
    """Delete KEY from every node that holds it."""
    k = decode_key(key, hex_input)
    with open_client(coordinator, token, config_file, timeout_s) as client:
        reply = client.run("Remove", lambda: client.client.delete(k))
    if as_json:
        emit_json({"key": show_bytes(k), "deleted": bool(reply.node_ids), "node_ids": list(reply.node_ids)})
        return
    if reply.node_ids:
        console().print(f"deleted {show_bytes(k)!r} from {', '.join(reply.node_ids)}")
    else:
        console().print(f"{show_bytes(k)!r} was on no node; nothing deleted")


# ---------------------------------------------------------------------------------------------
# unlist (a node gone for good)
# ---------------------------------------------------------------------------------------------
UNLIST_WARNING = ("keys still on that node become unreachable through this coordinator (reads of them answer "
                  "not found, writes go elsewhere)")


@click.command(cls=OneLineCommand, short_help="Tell the coordinator a node is gone for good.")
@click.argument("node")
@click.option("--force", is_flag=True, help="Unlist it even though its sync stream is connected (a running node "
                                            "comes back as a new node when it reconnects).")
@click.option("--yes", is_flag=True, help="Do not ask for confirmation (required when not run at a terminal).")
@coordinator_options
@guarded
def unlist(node: str, force: bool, yes: bool, coordinator: str | None, token: str | None, config_file: str | None,
           timeout_s: float | None, as_json: bool) -> None:
    """Unlist NODE (gone for good): the coordinator drops its filter replica, hints, counters and its
    entry in the state dir, and stops listing it as stale. Keys still on NODE become
    unreachable through this coordinator.

    A node whose sync stream is connected is refused unless --force is given.
    """
    check_node_ids(node)
    with open_client(coordinator, token, config_file, timeout_s) as client:
        if not yes:
            if not sys.stdin.isatty():
                raise ClientError(f"unlisting {node} needs --yes when not run at a terminal: {UNLIST_WARNING}",
                                  EXIT_USAGE)
            st = client.node_detail(node).status
            what = (f"{node} ({st.address or 'no address'}, {'connected' if st.connected else 'disconnected'}, "
                    f"{fmt_count(st.key_count)} keys last reported)")
            if not click.confirm(f"Unlist node {what}? {UNLIST_WARNING[0].upper()}{UNLIST_WARNING[1:]}.",
                                 default=False, err=True):
                raise CliFailure(f"not confirmed; {node} is still known to the coordinator", EXIT_FAILURE)
        reply = client.unlist_node(node, force=force)
    if as_json:
        emit_json(message_to_dict(reply))
        return
    forced = " (forced: it was connected)" if reply.was_connected else ""
    console().print(f"unlisted {reply.node_id}{forced}: {fmt_count(reply.key_count)} keys it last reported are no "
                    f"longer reachable through this coordinator; {reply.hints_dropped} read-your-writes hints "
                    f"dropped; it is no longer listed as stale")


# ---------------------------------------------------------------------------------------------
# policy
# ---------------------------------------------------------------------------------------------
POLICY_HELP = {
    "target_fpr": "false-positive rate new filters are sized for",
    "saturation_ratio": "flag a node when its FPR exceeds ratio x target",
    "growth": "rebuild capacity = growth x current keys",
    "shrink_below": "shrink when keys < shrink_below x capacity",
    "max_concurrent_rebuilds": "rebuilds allowed at the same time",
    "auto_rebuild": "rebuild flagged nodes without an operator",
    "stale_after_s": "seconds without a change or heartbeat before a node is stale",
    "mode": "safe: stale nodes join every candidate list; fast: they do not",
    "min_capacity": "smallest capacity a filter is sized for",
}


def parse_assignments(pairs: Iterable[str]) -> dict[str, str]:
    """NAME=VALUE strings -> dict (names may use - or _); a malformed pair is a ClientError."""
    values: dict[str, str] = {}
    for pair in pairs:
        name, sep, value = pair.partition("=")
        name = name.strip().replace("-", "_")
        if not sep or not name or not value.strip():
            raise ClientError(f"{pair!r} is not NAME=VALUE (e.g. target_fpr=0.01); names: "
                              f"{', '.join(POLICY_HELP)}", EXIT_USAGE)
        if name in values:
            raise ClientError(f"{name} is given twice: give each setting once", EXIT_USAGE)
        values[name] = value.strip()
    return values


def _print_policy(p: Any, title: str) -> None:
    table = Table(title=title)
    for col in ("name", "value", "meaning"):
        table.add_column(col)
    for field in p.DESCRIPTOR.fields:
        table.add_row(field.name, str(getattr(p, field.name)), POLICY_HELP.get(field.name, ""))
    console().print(table)


@click.group(cls=OneLineGroup)
def policy() -> None:
    """Show or change the coordinator's rebuild and routing policy."""


@policy.command("show")
@coordinator_options
@guarded
def policy_show(coordinator: str | None, token: str | None, config_file: str | None, timeout_s: float | None,
                as_json: bool) -> None:
    """Print the policy in force."""
    with open_client(coordinator, token, config_file, timeout_s) as client:
        p = client.get_policy()
    if as_json:
        emit_json(message_to_dict(p))
        return
    _print_policy(p, "policy")


@policy.command("set")
@click.argument("assignments", nargs=-1, required=True, metavar="NAME=VALUE...")
@coordinator_options
@guarded
def policy_set(assignments: tuple[str, ...], coordinator: str | None, token: str | None, config_file: str | None,
               timeout_s: float | None, as_json: bool) -> None:
    """Change policy settings; all are validated together and none applies if one is bad.

    NAME: target-fpr, saturation-ratio, growth, shrink-below, max-concurrent-rebuilds,
    auto-rebuild, stale-after-s, mode (safe|fast), min-capacity ('_' works for '-'),
    e.g. `shardsieve policy set target-fpr=0.005 mode=fast`.
    """
    values = parse_assignments(assignments)
    with open_client(coordinator, token, config_file, timeout_s) as client:
        p = client.set_policy(values)
    if as_json:
        emit_json(message_to_dict(p))
        return
    _print_policy(p, "policy (updated: " + ", ".join(sorted(values)) + ")")
