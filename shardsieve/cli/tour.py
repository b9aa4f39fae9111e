"""`shardsieve tour`: a coordinator and 8 nodes on loopback, an invented business's records, a short
load test and its report — then a clean shutdown, or (--keep) a running fleet to explore.

Ctrl-C (SIGINT) or SIGTERM at any point stops every process the tour started before it exits.
"""

from __future__ import annotations

import atexit
import re
import shlex
import shutil
import signal
import sys
import tempfile
import time
from pathlib import Path
from types import FrameType
from typing import Any

import click
from rich.console import Console

from shardsieve import scenario
from shardsieve.cli.loadtest import RichPhases, check_false_negatives, make_progress, render_report
from shardsieve.cli.ops import CliFailure, OneLineCommand, console, emit_json, guarded
from shardsieve.client import EXIT_FAILURE, EXIT_USAGE, CliSettings, ClientError, OperatorClient
from shardsieve.loadtest.runner import LoadtestOptions, NodeChannels, run_loadtest, wait_fleet_ready
from shardsieve.loadtest.runner import seed as seed_nodes

TOUR_NODES = 8


def _on_sigterm(signum: int, frame: FrameType | None) -> None:
    raise KeyboardInterrupt


def _listen_port(coordinator: str | None) -> int:
    if not coordinator:
        return 0
    host, sep, port = coordinator.rpartition(":")
    if not sep or host not in ("127.0.0.1", "localhost") or not port.isdigit() or not 0 < int(port) < 65536:
        raise ClientError(f"--coordinator {coordinator!r}: the tour listens on loopback, give 127.0.0.1:PORT",
                          EXIT_USAGE)
    return int(port)


@click.command(cls=OneLineCommand)
@click.option("--dir", "directory", type=click.Path(file_okay=False), default=None,
              help="Directory for stores, logs and the plot (default: a new temporary directory).")
@click.option("--keep", is_flag=True, help="Leave the fleet running and print the commands to explore it.")
@click.option("--nodes", type=click.IntRange(2, 32), default=TOUR_NODES, show_default=True,
              help="Storage nodes to start.")
@click.option("--records", type=click.IntRange(100, 200_000), default=12_000, show_default=True,
              help="Records of the invented business to seed.")
@click.option("--duration", "duration_s", type=click.FloatRange(min=1), default=8.0, show_default=True,
              help="Seconds of the load test.")
@click.option("--concurrency", type=click.IntRange(1, 64), default=4, show_default=True,
              help="Reader threads of the load test.")
@click.option("--seed", type=int, default=1, show_default=True, help="Random seed of records and workload.")
@click.option("--coordinator", default=None, metavar="127.0.0.1:PORT",
              help="Where the tour's coordinator listens (default: a free port).")
@click.option("--token", default=None, help="Bearer token the tour's coordinator will require (default: none).")
@click.option("--json", "as_json", is_flag=True, help="Print a JSON document (the report and where things are).")
@guarded
def tour(directory: str | None, keep: bool, nodes: int, records: int, duration_s: float, concurrency: int,
         seed: int, coordinator: str | None, token: str | None, as_json: bool) -> None:
    """Start a small fleet on this machine, seed the Brinewick Kelp Cooperative's records
    (an invented business), run a short load test and print its report."""
    from shardsieve.localcluster import LocalCluster
    from shardsieve.testing.procs import ProcessError

    started = time.monotonic()
    port = _listen_port(coordinator)
    workdir = Path(directory) if directory else Path(tempfile.mkdtemp(prefix="shardsieve-tour-"))
    workdir.mkdir(parents=True, exist_ok=True)
    out = console(stderr=as_json)
    previous_term = signal.signal(signal.SIGTERM, _on_sigterm)
    # Ctrl-C must stop the fleet even when SIGINT was inherited as ignored (e.g. started with `&`).
    previous_int = signal.signal(signal.SIGINT, signal.default_int_handler)
    node_ids = [f"shed-{i + 1:02d}" for i in range(nodes)]
    recs = scenario.records(records, seed)
    # Filters sized for an even share of the records; the cooperative's placement is uneven, so the
    # busiest sheds end up over capacity and show as saturated (auto-rebuild is off, to explore it).
    capacity = max(500, records // nodes)
    cluster = LocalCluster(workdir, node_ids=node_ids, capacity=capacity, fpr=0.01, token=token or "",
                           coordinator_port=port, extra_coordinator_args=["--auto-rebuild", "false"])
    report: dict[str, Any] | None = None
    kept = False          # set only once everything succeeded with --keep: any failure stops the fleet
    try:
        out.print(f"[bold]{scenario.BUSINESS}[/] (an invented business): starting a coordinator and {nodes} nodes "
                  f"in {workdir} …")
        out.print("security: plaintext gRPC on 127.0.0.1, explicitly allowed for this loopback tour "
                  "(allow-plaintext); a real fleet uses TLS, see docs/security.md")
        try:
            cluster.start()
        except (ProcessError, TimeoutError) as exc:
            found = re.search(r"lines of (\S+) ---", str(exc))
            where = f"see {found.group(1)}" if found else f"logs are in {workdir}"
            raise ClientError(f"the tour fleet did not start ({str(exc).splitlines()[0]}): {where}",
                              EXIT_FAILURE) from None
        settings = CliSettings(coordinator=cluster.coordinator_address, token=token or "", timeout_s=10.0)
        with OperatorClient(settings) as client:
            placed, owners = scenario.placed(recs, node_ids, seed)
            with make_progress(not as_json) as progress:
                phases = RichPhases(progress)
                view = wait_fleet_ready(client, 30.0, min_nodes=nodes)
                channels = NodeChannels(view, client.metadata, client.settings.credentials())
                try:
                    phases.start(f"seeding {len(placed):,} records on the sheds' nodes", len(placed))
                    seed_nodes(channels, [r.key for r in placed], owners, values=[r.value for r in placed],
                         on_progress=phases.advance)
                    phases.finish()
                finally:
                    channels.close()
                opts = LoadtestOptions(keys=len(placed), reuse=True, existing_share=0.5, zipf_s=1.0,
                                       concurrency=concurrency, duration_s=duration_s, seed=seed,
                                       ready_timeout_s=30.0, routable_timeout_s=30.0)
                result = run_loadtest(client, opts, phases)
        report = result.report
        plot_path = workdir / "tour-report.png"
        try:
            from shardsieve.loadtest.plot import draw
            report["plot"] = str(draw(plot_path, report, result.times_s, result.latency_ms))
        except Exception as exc:  # noqa: BLE001 - matplotlib missing or a drawing error: the report stands
            report["plot"] = None
            out.print(f"[yellow]no plot: {exc}[/]")
        if not as_json:
            render_report(report, out)
            if report["plot"]:
                out.print(f"plot: {report['plot']}")
        if keep:
            atexit.unregister(cluster.stop)
            pids = [h.process.pid for h in cluster.node_handles.values() if h.process] + (
                [cluster.coordinator.pid] if cluster.coordinator else [])
            (workdir / "pids").write_text(" ".join(str(p) for p in pids) + "\n")
            kept = True
        elapsed = time.monotonic() - started
        if as_json:
            emit_json({"business": scenario.BUSINESS, "directory": str(workdir),
                       "coordinator": cluster.coordinator_address, "kept": keep, "elapsed_s": elapsed,
                       "report": report})
        else:
            _print_next_steps(out, cluster.coordinator_address, workdir, keep, token, recs, elapsed)
        check_false_negatives(report)
    except KeyboardInterrupt:
        out.print("interrupted: stopping the tour fleet …")
        cluster.stop()
        raise CliFailure("interrupted; every process the tour started has been stopped", 130) from None
    finally:
        if not kept:
            cluster.stop()
        signal.signal(signal.SIGTERM, previous_term)
        signal.signal(signal.SIGINT, previous_int)


def command_word() -> str:
    """How to invoke this very `shardsieve` from the user's shell: the bare name when it is on
    PATH, else the script beside this interpreter (a virtualenv that is not activated), else
    `python -m` (the commands we print must work as pasted)."""
    script = Path(sys.executable).with_name("shardsieve")
    on_path = shutil.which("shardsieve")
    if on_path and (not script.exists() or Path(on_path).resolve() == script.resolve()):
        return "shardsieve"
    if script.exists():
        return shlex.quote(str(script))
    return f"{shlex.quote(sys.executable)} -m shardsieve.cli.main"


def _print_next_steps(out: Console, address: str, workdir: Path, keep: bool, token: str | None,
                      recs: list[scenario.Record], elapsed: float) -> None:
    if not keep:
        out.print(f"tour finished in {elapsed:.1f}s; every process is stopped. Logs and stores: {workdir} "
                  f"(rerun with --keep to explore the running fleet)")
        return
    env = f"export SHARDSIEVE_COORDINATOR={address}"
    if token:
        env += f" SHARDSIEVE_TOKEN={shlex.quote(token)}"
    key = shlex.quote(scenario.example_keys(recs, 1)[0])
    cmd = command_word()
    out.print(f"tour ready in {elapsed:.1f}s; the fleet keeps running. Explore it:\n"
              f"  {env}\n"
              f"  {cmd} status                       # red rows: sheds over capacity\n"
              f"  {cmd} locate {key}\n"
              f"  {cmd} get {key}\n"
              f"  {cmd} rebuild --flagged --dry-run   # then without --dry-run, with --wait\n"
              f"  {cmd} loadtest --reuse --duration 5\n"
              f"Stop it with: kill $(cat {shlex.quote(str(workdir / 'pids'))})")


