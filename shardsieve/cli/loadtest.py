"""`shardsieve loadtest`: seed keys on nodes, read through a coordinator, report the fan-out avoided."""

from __future__ import annotations

import threading
from typing import Any, Mapping

import click
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, SpinnerColumn, TextColumn, TimeElapsedColumn
from rich.table import Table

from shardsieve.cli.ops import (
    ClientError, CliFailure, OneLineCommand, console, coordinator_options, emit_json, fmt_rate, guarded, open_client,
)
from shardsieve.client import EXIT_FAILURE, EXIT_INVALID
from shardsieve.loadtest.runner import LoadtestOptions, Phases, run_loadtest

EXIT_FALSE_NEGATIVES = 8


class RichPhases(Phases):
    """Live progress on stderr: one bar per phase."""

    def __init__(self, progress: Progress) -> None:
        self.progress = progress
        self.task: Any = None

    def start(self, name: str, total: float | None) -> None:
        self.task = self.progress.add_task(name, total=total)

    def advance(self, amount: float) -> None:
        if self.task is not None:
            self.progress.advance(self.task, amount)

    def finish(self) -> None:
        if self.task is not None:
            task = self.progress.tasks[-1]
            self.progress.update(self.task, total=task.completed)
            self.task = None


def make_progress(enabled: bool) -> Progress:
    return Progress(SpinnerColumn(), TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                    TimeElapsedColumn(), console=Console(stderr=True), disable=not enabled)


def _num(x: float | None, fmt: str = "{:.3f}") -> str:
    return "-" if x is None else fmt.format(x)


def render_report(report: Mapping[str, Any], out: Console) -> None:
    """The human-readable report (the same figures as --json)."""
    lat = report["latency_ms"]
    head = Table(title="load test", show_header=False)
    head.add_column("", style="bold")
    head.add_column("")
    head.add_row("lookups", f"{report['lookups']:,} ({report['hits']:,} existing keys, {report['misses']:,} absent; "
                            f"{report['popularity']} popularity)")
    head.add_row("throughput", f"{report['throughput_per_s']:,.0f} lookups/s over {report['duration_s']:.1f}s "
                               f"with {report['concurrency']} threads")
    head.add_row("latency (HDR histogram)", f"p50 {lat['p50']:.2f} ms · p90 {lat['p90']:.2f} ms · "
                                            f"p99 {lat['p99']:.2f} ms · max {lat['max']:.2f} ms")
    head.add_row("avoided fan-out", f"{report['avoided_fanout']:.2%} measured, "
                                    f"{report['predicted_avoided_fanout']:.2%} predicted "
                                    f"(vs probing all {report['nodes']} nodes)")
    fn = report["false_negatives"]
    head.add_row("false negatives", f"[bold red]{fn}[/]" if fn else "0")
    if report.get("errors"):
        head.add_row("lookups not answered", f"{report['errors']:,} (a candidate node could not be asked)")
    out.print(head)

    probes = Table(title="probes per lookup: measured vs predicted from the fleet's filters")
    conf = f"{report['interval']['confidence']:.1%}"
    for col in ("keys", "measured", "predicted", "ratio", "first reads", f"{conf} interval", "inside"):
        probes.add_column(col, justify="right" if col != "keys" else "left")
    for label, side, m, p, r in (
        ("existing: 1 + Σ p_j (j ≠ owner)", "hit", report["probes_per_hit"], report["predicted_probes_per_hit"],
         report["ratio_hit"]),
        ("absent: Σ p_j", "miss", report["probes_per_miss"], report["predicted_probes_per_miss"], report["ratio_miss"]),
    ):
        iv = report["interval"][side]
        rng = "-" if iv.get("low") is None else f"{iv['low']:.4f} .. {iv['high']:.4f}"
        inside = "-" if iv.get("inside") is None else ("yes" if iv["inside"] else "[bold red]NO[/]")
        probes.add_row(label, _num(m, "{:.4f}"), _num(p, "{:.4f}"), _num(r), _num(iv.get("measured"), "{:.4f}"),
                       rng, inside)
    out.print(probes)
    out.print(f"[dim]check: {report['interval']['method']}. Existing keys count on their first read only "
              f"({report['interval']['hit'].get('keys', 0):,} distinct keys): repeated reads repeat the same "
              f"filter answers; absent keys are all fresh.[/]")

    nodes = Table(title="per node")
    for col in ("node", "predicted FPR", "wasted probes"):
        nodes.add_column(col, justify="left" if col == "node" else "right")
    wasted = report.get("wasted_probes_per_node", {})
    for nid, p in report["predicted_fpr_per_node"].items():
        nodes.add_row(nid, fmt_rate(p), f"{wasted.get(nid, 0):,}")
    out.print(nodes)
    if report.get("rebuilt_during_run"):
        out.print(f"[yellow]filters replaced during the run: {', '.join(report['rebuilt_during_run'])} (the "
                  f"prediction uses the filters at the start; turn auto_rebuild off for a clean measurement)[/]")
    if report.get("stale_during_run"):
        out.print(f"[yellow]stale or disconnected at the end of the run: {', '.join(report['stale_during_run'])} "
                  f"(safe mode lists them in every lookup, which inflates the measured probes)[/]")


@click.command(cls=OneLineCommand)
@click.option("--keys", "keys", type=click.IntRange(min=0), default=10_000, show_default=True,
              help="Keys to seed (placed at random on nodes, written to the nodes directly).")
@click.option("--reuse", is_flag=True, help="Seed nothing: read keys already stored on the nodes (up to --keys).")
@click.option("--existing-share", type=click.FloatRange(0, 1), default=0.5, show_default=True,
              help="Share of lookups for keys that exist; the rest ask for keys that exist nowhere.")
@click.option("--zipf", "zipf_s", type=click.FloatRange(min=0), default=0.0, show_default=True,
              help="Popularity of existing keys: Zipf exponent s (0: uniform).")
@click.option("--concurrency", type=click.IntRange(1, 1024), default=8, show_default=True,
              help="Threads reading at the same time.")
@click.option("--count", type=click.IntRange(min=1), default=None, help="Stop after this many lookups.")
@click.option("--duration", "duration_s", type=click.FloatRange(min=0, min_open=True), default=None,
              help="Stop after this many seconds (default 10 unless --count is given).")
@click.option("--value-size", type=click.IntRange(0, 1 << 20), default=64, show_default=True,
              help="Bytes per seeded value.")
@click.option("--seed", type=int, default=None, help="Random seed, for a reproducible workload.")
@click.option("--routable-timeout", type=click.FloatRange(min=0, min_open=True), default=120.0, show_default=True,
              help="Seconds to wait until the coordinator routes every seeded key.")
@click.option("--confidence", type=click.FloatRange(0, 1, min_open=True, max_open=True), default=0.999,
              show_default=True, help="Confidence of the binomial interval around the prediction.")
@click.option("--plot", "plot_path", type=click.Path(dir_okay=False), default=None,
              help="Draw probes per lookup and latency over the run to this PNG (needs matplotlib). Its folder "
                   "must exist; the path is checked before the run starts.")
@click.option("--keep-keys", is_flag=True,
              help="Leave the seeded keys (lt/<run>/...) on the nodes; by default they are removed at the end.")
@coordinator_options
@guarded
def loadtest(keys: int, reuse: bool, existing_share: float, zipf_s: float, concurrency: int, count: int | None,
             duration_s: float | None, value_size: int, seed: int | None, routable_timeout: float, confidence: float,
             plot_path: str | None, keep_keys: bool, coordinator: str | None, token: str | None,
             config_file: str | None, timeout_s: float | None, as_json: bool) -> None:
    """Measure probes per lookup against the prediction from the fleet's filters.

    Seeds --keys keys on the nodes directly (the coordinator learns them from the nodes' deltas),
    waits until every one is routed, then reads through the coordinator. The seeded keys are
    removed from the nodes at the end (also after a failure) unless --keep-keys. Exits 8 if any
    seeded key was reported absent (a false negative).
    """
    if count is not None and duration_s is not None:
        raise ClientError("give --count or --duration, not both", 2)
    if keys == 0 and existing_share > 0:
        raise ClientError("--keys 0 leaves no existing keys to read: pass --existing-share 0 or seed keys", 2)
    if plot_path:
        from shardsieve.loadtest.plot import check_target
        try:
            check_target(plot_path)
        except ValueError as exc:
            raise ClientError(f"{exc}; nothing was run", EXIT_INVALID) from None
    opts = LoadtestOptions(keys=keys, reuse=reuse, existing_share=existing_share, zipf_s=zipf_s,
                           concurrency=concurrency, count=count,
                           duration_s=None if count is not None else (duration_s or 10.0), value_size=value_size,
                           seed=seed, routable_timeout_s=routable_timeout, confidence=confidence, keep_keys=keep_keys)
    result = execute(opts, coordinator, token, config_file, timeout_s, show_progress=not as_json)
    report = result.report
    plot_error = None
    if plot_path:
        try:
            report["plot"] = draw_plot(plot_path, result)
        except RuntimeError as exc:   # the report stands whatever happens to the figure
            report["plot"], plot_error = None, str(exc)
            report["plot_error"] = plot_error
    if as_json:
        emit_json(report)
    else:
        out = console()
        render_report(report, out)
        if report.get("plot"):
            out.print(f"plot: {report['plot']}")
        if report.get("seed_prefix"):
            out.print(f"seeded keys ({report['seed_prefix']}...): " + (
                "kept on the nodes (--keep-keys)" if report.get("kept_seeded_keys")
                else f"{report['removed_seeded_keys']:,} removed from the nodes"))
    check_false_negatives(report)
    if plot_error:
        raise CliFailure(f"{plot_error}; the report above is complete", EXIT_FAILURE)


def execute(opts: LoadtestOptions, coordinator: str | None, token: str | None, config_file: str | None,
            timeout_s: float | None, show_progress: bool) -> Any:
    stop = threading.Event()
    with open_client(coordinator, token, config_file, timeout_s) as client:
        with make_progress(show_progress) as progress:
            try:
                return run_loadtest(client, opts, RichPhases(progress), stop)
            except KeyboardInterrupt:
                stop.set()
                raise


def draw_plot(path: str, result: Any) -> str:
    """Draw the figure; RuntimeError (with a one-line reason) when it cannot be written."""
    from shardsieve.loadtest.plot import draw
    return str(draw(path, result.report, result.times_s, result.latency_ms))


def check_false_negatives(report: Mapping[str, Any]) -> None:
    fn = report["false_negatives"]
    if fn:
        sample = ", ".join(report.get("false_negative_keys", [])[:3])
        raise CliFailure(f"{fn} seeded keys were reported absent (false negatives; e.g. {sample}): the routing "
                         f"promise is broken, check `shardsieve status` and the coordinator log", EXIT_FALSE_NEGATIVES)
