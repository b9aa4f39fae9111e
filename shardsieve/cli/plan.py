"""`shardsieve plan`: size per-node filters and show what they cost and save a fleet."""

from __future__ import annotations

import json
import math
from collections.abc import Callable

import click

from shardsieve.fleet_plan import Plan, plan as make_plan

JSON_FIELDS = (
    "keys", "fpr", "nodes", "bits_per_key", "hashes", "formula_bits", "ladder_bits",
    "filter_bytes_per_node", "coordinator_bytes", "expected_probes_hit", "expected_probes_miss",
    "avoided_fanout_hit", "avoided_fanout_miss", "predicted_fpr_at_ladder",
    "formula_filter_bytes", "ladder_bits_per_key",
)


def _human_bytes(n: int) -> str:
    value = float(n)
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if value < 1024 or unit == "TiB":
            return f"{value:.0f} {unit}" if unit == "B" else f"{value:.2f} {unit}"
        value /= 1024
    return f"{n} B"  # pragma: no cover


class PlanArgumentError(click.ClickException):
    """A bad argument: printed as one line `Error: --option value: why`, exit status 2."""

    exit_code = 2


def _parse_fpr(ctx: click.Context, param: click.Parameter, value: str | None) -> float:
    if value is None:
        raise PlanArgumentError("--fpr is required: the target false-positive rate, e.g. --fpr 0.01")
    try:
        fpr = float(value)
    except ValueError:
        raise PlanArgumentError(f"--fpr {value!r} is not a number; give a rate strictly between 0 and 1, "
                                "e.g. --fpr 0.01") from None
    if math.isnan(fpr) or not 0.0 < fpr < 1.0:
        raise PlanArgumentError(f"--fpr {value} is outside (0, 1); a false-positive rate must be strictly "
                                "between 0 and 1, e.g. --fpr 0.01")
    return fpr


def _whole(option: str, what: str, default: int | None = None) -> Callable[[click.Context, click.Parameter, str | None], int]:
    """A click callback parsing a whole number >= 1 (our own message instead of click's three lines)."""
    def check(ctx: click.Context, param: click.Parameter, value: str | None) -> int:
        if value is None:
            if default is None:
                raise PlanArgumentError(f"{option} is required: {what}")
            return default
        try:
            number = int(value.replace("_", ""))
        except ValueError:
            raise PlanArgumentError(f"{option} {value!r} is not a whole number; {what} must be an integer >= 1") from None
        if number < 1:
            raise PlanArgumentError(f"{option} {value} is below 1; {what} must be at least 1")
        return number
    return check


def _render(p: Plan) -> None:
    from rich.console import Console
    from rich.table import Table

    table = Table(title=f"Filter plan: {p.keys:,} keys per node, target FPR {p.fpr:g}, {p.nodes} node(s)",
                  show_header=True, header_style="bold")
    table.add_column("figure")
    table.add_column("value", justify="right")
    table.add_column("how", style="dim")
    table.add_row("bits per key (formula)", f"{p.bits_per_key:.3f}", "-ln p / (ln 2)^2  (Bloom 1970)")
    table.add_row("hashes k", str(p.hashes), "round((m/n) ln 2) of the formula m")
    table.add_row("bits m (formula)", f"{p.formula_bits:,}", f"{_human_bytes(p.formula_filter_bytes)}")
    table.add_row("bits m (ladder step used)", f"{p.ladder_bits:,}",
                  f"next power of two; {p.ladder_bits_per_key:.2f} bits per key")
    table.add_row("filter bytes per node", f"{p.filter_bytes_per_node:,}", _human_bytes(p.filter_bytes_per_node))
    table.add_row("coordinator bytes", f"{p.coordinator_bytes:,}",
                  f"{_human_bytes(p.coordinator_bytes)} = {p.nodes} replica(s)")
    table.add_row("predicted FPR at ladder step", f"{p.predicted_fpr_at_ladder:.3g}", "(1 - e^(-kn/m))^k")
    table.add_row("probes per lookup, key exists", f"{p.expected_probes_hit:.4f}", "1 + (K-1) p")
    table.add_row("probes per lookup, key absent", f"{p.expected_probes_miss:.4f}", "K p")
    table.add_row("avoided fan-out, key exists", f"{p.avoided_fanout_hit:.2%}", "1 - probes / K")
    table.add_row("avoided fan-out, key absent", f"{p.avoided_fanout_miss:.2%}", "1 - K p / K")
    Console().print(table)


@click.command("plan")
@click.option("--keys", "keys", type=str, default=None, metavar="N", callback=_whole("--keys", "expected keys per node"),
              help="Expected keys per node (each node's filter is sized for this many).")
@click.option("--fpr", "fpr", type=str, default=None, metavar="P", callback=_parse_fpr,
              help="Target false-positive rate per node filter, strictly between 0 and 1.")
@click.option("--nodes", "nodes", type=str, default=None, metavar="K", callback=_whole("--nodes", "the number of nodes", 1),
              help="Nodes in the fleet (K)  [default: 1]")
@click.option("--json", "as_json", is_flag=True, help="Print the figures as one JSON object.")
def plan(keys: int, fpr: float, nodes: int, as_json: bool) -> None:
    """Size a node filter for --keys N at --fpr P; show bytes, probes and avoided fan-out for --nodes K.

    Figures come from the sizing formula; the filter actually allocated is the next ladder
    step (a power of two), shown beside it.
    """
    try:
        result = make_plan(keys, fpr, nodes)
    except ValueError as exc:
        raise PlanArgumentError(str(exc)) from None
    if as_json:
        data = result.to_json_dict()
        click.echo(json.dumps({name: data[name] for name in JSON_FIELDS}, sort_keys=False))
        return
    _render(result)
