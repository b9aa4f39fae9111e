"""`shardsieve bench reads`: an application's read paths side by side on one local fleet.

One fleet of real processes (shardsieve.localcluster: a coordinator and N nodes on loopback),
one run, the same keys (half of the reads ask for keys that exist, half for keys on no node),
the same client threads, every path in turn, in rounds (each path once per round; the best
round of each path counts, so load from other processes on the machine hits all paths alike):

- fanout:           a Get to every node per read (what an application does without a directory)
- coordinator:      `Client.get` through the coordinator's Router (Read)
- batch:            `Client.get_many` in batches (ReadBatch: one node batch call per node)
- locate_direct:    `Client.locate` at the coordinator, then a Get to each candidate directly
- local:            `Client(local_routing=True).get`: the replica in process, nodes probed directly
- oracle:           exactly one Get per read, to the node that holds the key (for an absent key,
                    the node it would be placed on): the baseline every ratio divides by

Per path: reads/s (keys/s for batch), p50/p99 latency per call, probes per read (node calls
per read: a batch call counts once per key it carries), and CPU per read of this process (the
client) and of the coordinator, from utime + stime in /proc/PID/stat (proc(5)), since on a small
machine the client competes with the fleet for the same cores. Ratios against the oracle and
against the fan-out; verdicts against the targets below.
"""

from __future__ import annotations

import json
import os
import tempfile
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import click
import numpy as np

TARGETS = {
    "local_vs_oracle": 0.8,          # local routing >= 0.8 x the oracle
    "coordinator_vs_oracle": 0.6,    # coordinator Read >= 0.6 x the oracle
    "batch_vs_coordinator": 5.0,     # batch keys/s >= 5 x single coordinator reads/s
    "routed_vs_fanout": 8.0,         # every routed path >= 8 x the full fan-out
}
ROUTED = ("coordinator", "batch", "locate_direct", "local")
PATHS = ("fanout", "coordinator", "batch", "locate_direct", "local", "oracle")


def cpu_seconds(pid: int) -> float:
    """utime + stime of a process in seconds (proc(5): fields 14 and 15 of /proc/PID/stat, in
    clock ticks of sysconf(SC_CLK_TCK))."""
    text = Path(f"/proc/{pid}/stat").read_text()
    fields = text[text.rindex(")") + 2:].split()    # after the command name, which may hold spaces
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


@dataclass
class PathFigures:
    reads: int = 0
    seconds: float = 0.0
    probes: int = 0
    latencies_s: list[float] = field(default_factory=list)
    client_cpu_s: float = 0.0
    coordinator_cpu_s: float = 0.0
    found: int = 0

    @property
    def rate(self) -> float:
        return self.reads / self.seconds if self.seconds else 0.0

    def summary(self) -> dict[str, Any]:
        lat = np.array(self.latencies_s) * 1e3 if self.latencies_s else np.zeros(1)
        per = max(self.reads, 1)
        return {"reads_per_s": round(self.rate, 1), "reads": self.reads, "seconds": round(self.seconds, 3),
                "p50_ms": round(float(np.percentile(lat, 50)), 3), "p99_ms": round(float(np.percentile(lat, 99)), 3),
                "probes_per_read": round(self.probes / per, 3), "found_share": round(self.found / per, 3),
                "client_cpu_us_per_read": round(self.client_cpu_s / per * 1e6, 1),
                "coordinator_cpu_us_per_read": round(self.coordinator_cpu_s / per * 1e6, 1)}


def _drive(threads: int, seconds: float, keys: list[bytes], one: Callable[[int], tuple[int, int, int]],
           coordinator_pid: int) -> PathFigures:
    """Call one(i) from `threads` threads for `seconds`; one returns (reads, probes, found) of a call."""
    out = PathFigures()
    lock = threading.Lock()
    stop_at = time.perf_counter() + seconds
    counter = iter(range(1 << 62))

    def worker() -> None:
        local_lat: list[float] = []
        reads = probes = found = 0
        while time.perf_counter() < stop_at:
            with lock:
                i = next(counter)
            t0 = time.perf_counter()
            r, p, f = one(i)
            local_lat.append(time.perf_counter() - t0)
            reads, probes, found = reads + r, probes + p, found + f
        with lock:
            out.reads += reads
            out.probes += probes
            out.found += found
            out.latencies_s += local_lat

    me, coord0 = cpu_seconds(os.getpid()), cpu_seconds(coordinator_pid)
    t0 = time.perf_counter()
    pool = [threading.Thread(target=worker) for _ in range(threads)]
    for t in pool:
        t.start()
    for t in pool:
        t.join()
    out.seconds = time.perf_counter() - t0
    out.client_cpu_s = cpu_seconds(os.getpid()) - me
    out.coordinator_cpu_s = cpu_seconds(coordinator_pid) - coord0
    return out


def measure(nodes: int = 16, keys: int = 20_000, threads: int = 8, seconds: float = 4.0, rounds: int = 2,
            batch: int = 100, seed: int = 1, log: Callable[[str], None] = lambda s: None) -> dict[str, Any]:
    from shardsieve.client import Client
    from shardsieve.localcluster import LocalCluster
    from shardsieve.loadtest.workload import absent_key, seed_key
    from shardsieve.v1 import storage_pb2

    rng = np.random.default_rng(seed)
    with tempfile.TemporaryDirectory(prefix="shardsieve-bench-reads-") as tmp, \
            LocalCluster(Path(tmp), nodes=nodes, capacity=max(2 * keys // nodes, 1000)) as cluster:
        node_ids = sorted(cluster.node_addresses)
        run_id = f"br{seed}"
        present = [seed_key(run_id, i) for i in range(keys)]
        owner = {k: node_ids[int(j)] for k, j in zip(present, rng.integers(0, nodes, size=keys))}
        stubs = {n: cluster.storage(n) for n in node_ids}
        log(f"seeding {keys} keys on {nodes} nodes")
        by_node: dict[str, list[bytes]] = {}
        for k, n in owner.items():
            by_node.setdefault(n, []).append(k)
        for n, ks in by_node.items():
            for lo in range(0, len(ks), 500):
                stubs[n].BatchPut(storage_pb2.BatchPutRequest(items=[
                    storage_pb2.PutRequest(key=k, value=b"kelp-line-" + k[-6:]) for k in ks[lo:lo + 500]]), timeout=30)
        absent = [absent_key(run_id, i) for i in range(keys)]
        for k in absent:
            owner.setdefault(k, node_ids[hash(k) % nodes])
        workload = [present[i] if rng.random() < 0.5 else absent[i] for i in rng.permutation(keys)]
        coordinator_pid = cluster.coordinator.pid  # type: ignore[union-attr]
        client = Client(cluster.coordinator_address, timeout_s=10.0)
        local = Client(cluster.coordinator_address, local_routing=True, timeout_s=10.0)
        try:
            log("waiting until every seeded key is routable")
            deadline = time.monotonic() + 120
            pending = present
            while pending:
                rows = client.locate_many(pending[:5000])
                pending = [k for k, row in zip(pending[:5000], rows) if owner[k] not in {c.node_id for c in row}] \
                    + pending[5000:]
                if pending and time.monotonic() > deadline:
                    raise click.ClickException(f"{len(pending)} seeded keys still not routable after 120 s")
                if pending:
                    time.sleep(0.05)
            local.wait_local_ready(30)
            n_work = len(workload)

            def key(i: int) -> bytes:
                return workload[i % n_work]

            def fanout(i: int) -> tuple[int, int, int]:
                k = key(i)
                futures = [stubs[n].Get.future(storage_pb2.GetRequest(key=k), timeout=10) for n in node_ids]
                found = sum(1 for f in futures if f.result().found)
                return 1, nodes, int(found > 0)

            def coordinator(i: int) -> tuple[int, int, int]:
                r = client.get(key(i))
                return 1, r.candidates, int(r.found)

            def batched(i: int) -> tuple[int, int, int]:
                start = (i * batch) % n_work
                ks = [workload[(start + j) % n_work] for j in range(batch)]
                results = client.get_many(ks)
                return len(ks), sum(r.candidates for r in results), sum(r.found for r in results)

            def locate_direct(i: int) -> tuple[int, int, int]:
                k = key(i)
                cands = client.locate(k)
                futures = [stubs[c.node_id].Get.future(storage_pb2.GetRequest(key=k), timeout=10) for c in cands]
                return 1, len(cands), int(any(f.result().found for f in futures))

            def local_read(i: int) -> tuple[int, int, int]:
                r = local.get(key(i))
                return 1, r.candidates, int(r.found)

            def oracle(i: int) -> tuple[int, int, int]:
                k = key(i)
                return 1, 1, int(stubs[owner[k]].Get(storage_pb2.GetRequest(key=k), timeout=10).found)

            fns = {"fanout": fanout, "coordinator": coordinator, "batch": batched, "locate_direct": locate_direct,
                   "local": local_read, "oracle": oracle}
            for fn in fns.values():      # warm every channel and code path
                for i in range(50):
                    fn(i)
            best: dict[str, PathFigures] = {}
            for r in range(rounds):
                for name in PATHS:
                    figures = _drive(threads, seconds, workload, fns[name], coordinator_pid)
                    log(f"round {r + 1}/{rounds} {name:>13}: {figures.rate:9.1f} reads/s")
                    if name not in best or figures.rate > best[name].rate:
                        best[name] = figures
        finally:
            client.close()
            local.close()
    return report(best, nodes=nodes, keys=keys, threads=threads, seconds=seconds, rounds=rounds, batch=batch)


def report(best: dict[str, PathFigures], **setup: Any) -> dict[str, Any]:
    oracle, fan = best["oracle"].rate, best["fanout"].rate
    paths = {name: {**f.summary(), "vs_oracle": round(f.rate / oracle, 3) if oracle else None,
                    "vs_fanout": round(f.rate / fan, 2) if fan else None} for name, f in best.items()}
    coord = best["coordinator"].rate
    verdicts = {
        "local_vs_oracle": _verdict(paths["local"]["vs_oracle"], TARGETS["local_vs_oracle"]),
        "coordinator_vs_oracle": _verdict(paths["coordinator"]["vs_oracle"], TARGETS["coordinator_vs_oracle"]),
        "batch_vs_coordinator": _verdict(round(best["batch"].rate / coord, 2) if coord else None,
                                         TARGETS["batch_vs_coordinator"]),
        **{f"{name}_vs_fanout": _verdict(paths[name]["vs_fanout"], TARGETS["routed_vs_fanout"]) for name in ROUTED},
    }
    return {"setup": setup, "paths": paths, "targets": TARGETS, "verdicts": verdicts,
            "cpu_source": "utime+stime of /proc/PID/stat (proc(5)); client = this process"}


def _verdict(value: float | None, target: float) -> dict[str, Any]:
    return {"value": value, "target": target, "met": value is not None and value >= target}


def print_report(result: dict[str, Any]) -> None:
    s = result["setup"]
    click.echo(f"reads on a local fleet of {s['nodes']} nodes, {s['threads']} client threads, {s['keys']} keys "
               f"(half the reads absent), best of {s['rounds']} rounds of {s['seconds']} s per path")
    click.echo(f"{'path':>14} {'reads/s':>10} {'p50 ms':>8} {'p99 ms':>8} {'probes':>7} {'client us':>10} "
               f"{'coord us':>9} {'x oracle':>9} {'x fanout':>9}")
    for name in PATHS:
        p = result["paths"][name]
        click.echo(f"{name:>14} {p['reads_per_s']:>10.1f} {p['p50_ms']:>8.2f} {p['p99_ms']:>8.2f} "
                   f"{p['probes_per_read']:>7.2f} {p['client_cpu_us_per_read']:>10.0f} "
                   f"{p['coordinator_cpu_us_per_read']:>9.0f} {p['vs_oracle']:>9.2f} {p['vs_fanout']:>9.2f}")
    click.echo("(batch: keys/s and latency per call of its batch; CPU in microseconds per read)")
    for name, v in result["verdicts"].items():
        click.echo(f"  {'MET ' if v['met'] else 'MISSED'} {name}: {v['value']} (target >= {v['target']})")


@click.command("reads")
@click.option("--nodes", type=click.IntRange(min=1, max=64), default=16, show_default=True, help="Nodes in the fleet.")
@click.option("--keys", type=click.IntRange(min=100), default=20_000, show_default=True, help="Keys seeded.")
@click.option("--threads", type=click.IntRange(min=1, max=64), default=8, show_default=True, help="Client threads.")
@click.option("--seconds", type=click.FloatRange(min=0.5), default=4.0, show_default=True,
              help="Seconds per path per round.")
@click.option("--rounds", type=click.IntRange(min=1), default=2, show_default=True, help="Rounds over all paths.")
@click.option("--batch", type=click.IntRange(min=1, max=1000), default=100, show_default=True,
              help="Keys per batch read.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object instead of the text report.")
def bench_reads(nodes: int, keys: int, threads: int, seconds: float, rounds: int, batch: int, as_json: bool) -> None:
    """Read paths side by side on one local fleet: fan-out, coordinator, batch, locate-then-direct,
    local routing, and the one-probe oracle."""
    result = measure(nodes=nodes, keys=keys, threads=threads, seconds=seconds, rounds=rounds, batch=batch,
                     log=(lambda s: None) if as_json else (lambda s: click.echo(s, err=True)))
    if as_json:
        click.echo(json.dumps(result, indent=2, sort_keys=True))
    else:
        print_report(result)
