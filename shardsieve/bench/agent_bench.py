"""`shardsieve bench agent`: how fast an agent follows its store, against the store itself.

For each store (Redis, PostgreSQL), on real servers from the Debian packages
(shardsieve.testing.servers) and a real `shardsieve agent` process under a real coordinator,
side by side in one run:

- accept rate (the baseline): a pipelined writer's new keys per second into a part of the
  same server that no agent watches (Redis: another database; PostgreSQL: a table outside
  the agent's publication);
- absorbed rate: the same writer into the watched part; keys per second from its first write
  until the agent's ledger counted every key (read from the agent's metrics endpoint), and
  its ratio to the accept rate (target >= 0.5). The two runs alternate over a few rounds and
  each side keeps its best round (the machine is shared: its load hits both alike). The
  writer's own rate meanwhile is printed beside it;
- change -> routable: a key written at a random phase of the agent's push timer, then the time
  until the coordinator's Locate lists the agent for it (not as stale); p50 and p99 (target:
  p99 <= push interval + 100 ms, docs/architecture.md#3-bounded-staleness);
- the agent process's CPU time per key absorbed (/proc/PID/stat, proc(5)): its hot path's
  cost, which the shared machine's load does not blur as it blurs rates;
- memory: the agent process's resident set growth per key absorbed (/proc/PID/status VmRSS,
  proc(5)), beside the ledger's own figure: tracemalloc over a MemoryKeyLedger holding the
  same keys (Redis), or the SQLite ledger's file bytes per key (PostgreSQL).
"""

from __future__ import annotations

import json
import os
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path
from typing import Any, Callable

import click
import numpy as np

from shardsieve.bench.routing_bench import _percentile

Log = Callable[[str], None]
AGENT_REDIS = "brinewick-cache"
AGENT_PG = "gullrock-ledger"
ROLE = "kelp_agent"
BATCH = 1000
VALUE = b"sugar-kelp 40 kg"


def _key(run: str, i: int) -> bytes:
    return f"harvest:{run}:{i:09d}".encode()


def _rss_bytes(pid: int) -> int:
    """VmRSS of a process (proc(5): /proc/PID/status, in kB)."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    raise RuntimeError(f"no VmRSS for process {pid}")


def _cpu_seconds(pid: int) -> float:
    """User + system CPU time of a process, all threads (proc(5): /proc/PID/stat fields 14, 15)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _counted(metrics_port: int) -> float:
    from shardsieve.testing.agent_oracle import scrape

    return scrape(metrics_port)["shardsieve_agent_keys_counted_total"]


def _wait_counted(metrics_port: int, target: float, timeout: float) -> float:
    """Poll the agent's metrics until its ledger counted `target` keys; returns when (perf_counter)."""
    deadline = time.perf_counter() + timeout
    while True:
        if _counted(metrics_port) >= target:
            return time.perf_counter()
        if time.perf_counter() > deadline:
            raise RuntimeError(f"the agent counted {_counted(metrics_port):.0f} of {target:.0f} keys "
                               f"within {timeout:.0f} s")
        time.sleep(0.01)


def _absorb(write_all: Callable[[], None], metrics_port: int, pid: int, n: int) -> dict[str, float]:
    """Write n new keys into the watched store; time until the agent counted them all, and the
    CPU time the agent process spent meanwhile."""
    base = _counted(metrics_port)
    cpu0 = _cpu_seconds(pid)
    t0 = time.perf_counter()
    write_all()
    written = time.perf_counter()
    done = _wait_counted(metrics_port, base + n, timeout=max(120.0, 20 * (written - t0)))
    return {"absorbed_keys_per_s": n / (done - t0), "writer_keys_per_s_while_absorbing": n / (written - t0),
            "absorb_lag_after_last_write_ms": (done - written) * 1000.0, "cpu_s": _cpu_seconds(pid) - cpu0}


def _side_by_side(write: Callable[[bool, str, int], None], metrics_port: int, pid: int, n: int,
                  rounds: int) -> dict[str, float]:
    """Accept and absorb runs interleaved over `rounds` rounds of n/rounds keys each; the best
    rate of each side (the run least disturbed by other work on the machine, which hits both
    alike), the agent's CPU per key over every absorbed key. write(watched, prefix, count)."""
    per = n // rounds
    accepts: list[float] = []
    absorbs: list[dict[str, float]] = []
    for r in range(rounds):
        t0 = time.perf_counter()
        write(False, f"u{r}", per)
        accepts.append(per / (time.perf_counter() - t0))
        absorbs.append(_absorb(lambda: write(True, f"w{r}", per), metrics_port, pid, per))
    best = max(absorbs, key=lambda a: a["absorbed_keys_per_s"])
    accept = max(accepts)
    return {"accept_keys_per_s": accept, "absorbed_keys_per_s": best["absorbed_keys_per_s"],
            "absorbed_vs_accept": best["absorbed_keys_per_s"] / accept,
            "writer_keys_per_s_while_absorbing": best["writer_keys_per_s_while_absorbing"],
            "absorb_lag_after_last_write_ms": max(a["absorb_lag_after_last_write_ms"] for a in absorbs),
            "agent_cpu_us_per_key": sum(a["cpu_s"] for a in absorbs) / (per * rounds) * 1e6,
            "keys_absorbed": per * rounds}


def _routable_latency(write_one: Callable[[bytes], None], router: Any, agent: str, writes: int,
                      push_interval_ms: int, run: str) -> dict[str, float]:
    from shardsieve.v1 import routing_pb2

    phase = np.random.default_rng(7)
    lat = []
    for i in range(writes):
        key = f"routable:{run}:{i}".encode()
        # Writes arrive at random phases of the push timer (as in `bench routing`).
        time.sleep(float(phase.uniform(0.0, push_interval_ms / 1000.0)))
        write_one(key)
        t0 = time.perf_counter()          # the store acknowledged the change; now until routable
        deadline = t0 + 10.0
        while True:
            cands = router.Locate(routing_pb2.LocateRequest(key=key), timeout=5).candidates
            if any(c.node_id == agent and not c.stale for c in cands):
                break
            if time.perf_counter() > deadline:
                raise RuntimeError(f"{key!r} written to the store was not routable within 10 s")
        lat.append((time.perf_counter() - t0) * 1000.0)
    return {"change_to_routable_p50_ms": _percentile(lat, 50), "change_to_routable_p99_ms": _percentile(lat, 99)}


def _ledger_bytes_per_key(keys: list[bytes]) -> float:
    """tracemalloc's count of what a MemoryKeyLedger allocates to hold `keys` (keys included)."""
    from shardsieve.node.adapters.ledger import MemoryKeyLedger

    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        ledger = MemoryKeyLedger()
        for i in range(0, len(keys), BATCH):
            # fresh key objects, made while traced, as the feed hands them over
            ledger.put_many([(bytes(bytearray(k)), b"") for k in keys[i:i + BATCH]])
        held = tracemalloc.get_traced_memory()[0] - before
    finally:
        tracemalloc.stop()
    assert ledger.count() == len(keys)
    return held / len(keys)


# --------------------------------------------------------------------------- Redis


def measure_redis(cluster: Any, server: Any, metrics_port: int, n: int, writes: int, push_interval_ms: int,
                  rounds: int, log: Log) -> dict[str, Any]:
    run = f"r{os.getpid()}"
    clients = {True: server.client(0), False: server.client(1)}    # database 0 is watched, 1 is not

    def write(watched: bool, prefix: str, count: int) -> None:
        client = clients[watched]
        for start in range(0, count, BATCH):
            pipe = client.pipeline(transaction=False)
            for i in range(start, min(count, start + BATCH)):
                pipe.set(_key(run + prefix, i), VALUE)
            pipe.execute()

    log(f"Redis: {n:,} new keys by a pipelined writer ({BATCH} SETs per round trip), into database 1 (not "
        f"watched) and database 0 (watched) in turn, {rounds} rounds")
    pid = cluster.node_process(AGENT_REDIS).pid
    rss0 = _rss_bytes(pid)
    out: dict[str, Any] = _side_by_side(write, metrics_port, pid, n, rounds)
    absorbed = out["keys_absorbed"]
    out.update({"rss_bytes_per_key": (_rss_bytes(pid) - rss0) / absorbed,
                "ledger_bytes_per_key": _ledger_bytes_per_key([_key(run + "w0", i) for i in range(absorbed)]),
                "key_bytes": len(_key(run + "w0", 0))})
    log(f"  accepted by Redis: {out['accept_keys_per_s']:,.0f} keys/s (best round)")
    log(f"  absorbed by the agent: {out['absorbed_keys_per_s']:,.0f} keys/s (best round) = "
        f"{out['absorbed_vs_accept']:.2f} of the accept rate (writer meanwhile "
        f"{out['writer_keys_per_s_while_absorbing']:,.0f} keys/s; last key counted at most "
        f"{out['absorb_lag_after_last_write_ms']:.0f} ms after the last write; agent CPU "
        f"{out['agent_cpu_us_per_key']:.1f} us per key)")
    log(f"  memory per key ({out['key_bytes']}-byte keys): agent RSS +{out['rss_bytes_per_key']:.0f} B; "
        f"the memory ledger alone {out['ledger_bytes_per_key']:.0f} B")
    out.update(_routable_latency(lambda key: clients[True].set(key, VALUE), cluster.router(), AGENT_REDIS, writes,
                                 push_interval_ms, run))
    log(f"  SET -> routable: p50 {out['change_to_routable_p50_ms']:.1f} ms, p99 "
        f"{out['change_to_routable_p99_ms']:.1f} ms (push interval {push_interval_ms} ms)")
    return out


# --------------------------------------------------------------------------- PostgreSQL


def prepare_postgres(pg: Any) -> str:
    pg.execute(f"CREATE ROLE {ROLE} LOGIN REPLICATION")
    pg.execute(f"CREATE DATABASE cooperative OWNER {ROLE}")
    for table in ("harvest", "harvest_unwatched"):
        pg.execute(f"CREATE TABLE {table} (tag text PRIMARY KEY, note text)", dbname="cooperative", user=ROLE)
    return pg.url("cooperative", ROLE, table="harvest", key="tag", value="note")


def measure_postgres(cluster: Any, pg: Any, state_dir: Path, metrics_port: int, n: int, writes: int,
                     push_interval_ms: int, rounds: int, log: Log) -> dict[str, Any]:
    import psycopg2
    import psycopg2.extras

    run = f"p{os.getpid()}"
    conn = psycopg2.connect(pg.dsn("cooperative", ROLE))
    conn.autocommit = True

    def write(watched: bool, prefix: str, count: int) -> None:
        table = "harvest" if watched else "harvest_unwatched"
        with conn.cursor() as cur:
            for start in range(0, count, BATCH):
                rows = [(_key(run + prefix, i).decode(), VALUE.decode()) for i in range(start, min(count, start + BATCH))]
                psycopg2.extras.execute_values(cur, f"INSERT INTO {table} (tag, note) VALUES %s", rows, page_size=BATCH)

    log(f"PostgreSQL: {n:,} new rows by a batched writer ({BATCH} rows per INSERT, one transaction each), into a "
        f"table outside the agent's publication and the watched one in turn, {rounds} rounds")
    pid = cluster.node_process(AGENT_PG).pid
    rss0 = _rss_bytes(pid)
    ledger_dir = state_dir / "ledger"
    disk0 = sum(f.stat().st_size for f in ledger_dir.iterdir())
    out: dict[str, Any] = _side_by_side(write, metrics_port, pid, n, rounds)
    absorbed = out["keys_absorbed"]
    out.update({"rss_bytes_per_key": (_rss_bytes(pid) - rss0) / absorbed,
                "ledger_disk_bytes_per_key": (sum(f.stat().st_size for f in ledger_dir.iterdir()) - disk0) / absorbed,
                "key_bytes": len(_key(run + "w0", 0))})
    log(f"  accepted by PostgreSQL: {out['accept_keys_per_s']:,.0f} rows/s (best round)")
    log(f"  absorbed by the agent: {out['absorbed_keys_per_s']:,.0f} rows/s (best round) = "
        f"{out['absorbed_vs_accept']:.2f} of the accept rate (writer meanwhile "
        f"{out['writer_keys_per_s_while_absorbing']:,.0f} rows/s; last key counted at most "
        f"{out['absorb_lag_after_last_write_ms']:.0f} ms after the last commit; agent CPU "
        f"{out['agent_cpu_us_per_key']:.1f} us per key)")
    log(f"  memory per key ({out['key_bytes']}-byte keys): agent RSS +{out['rss_bytes_per_key']:.0f} B; "
        f"the SQLite ledger on disk +{out['ledger_disk_bytes_per_key']:.0f} B")

    def insert_one(key: bytes) -> None:
        with conn.cursor() as cur:
            cur.execute("INSERT INTO harvest (tag, note) VALUES (%s, %s)", (key.decode(), VALUE.decode()))

    out.update(_routable_latency(insert_one, cluster.router(), AGENT_PG, writes, push_interval_ms, run))
    log(f"  INSERT commit -> routable: p50 {out['change_to_routable_p50_ms']:.1f} ms, p99 "
        f"{out['change_to_routable_p99_ms']:.1f} ms (push interval {push_interval_ms} ms)")
    conn.close()
    return out


# --------------------------------------------------------------------------- the command


def run_bench(n_redis: int, n_pg: int, writes: int, push_interval_ms: int, log: Log,
              stores: tuple[str, ...] = ("redis", "postgresql"), rounds: int = 3) -> dict[str, Any]:
    from shardsieve.localcluster import LocalCluster
    from shardsieve.testing.procs import free_port
    from shardsieve.testing.servers import postgres_bin_dir, redis_binary, start_postgres, start_redis

    redis_bin = redis_binary() if "redis" in stores else None
    pg_bin = postgres_bin_dir() if "postgresql" in stores else None
    result: dict[str, Any] = {"push_interval_ms": push_interval_ms, "redis": None, "postgresql": None}
    if redis_bin is None and "redis" in stores:
        log("Redis: not measured (redis-server not found; install the Debian package redis-server)")
    if pg_bin is None and "postgresql" in stores:
        log("PostgreSQL: not measured (server binaries not found; install the Debian package postgresql)")
    with tempfile.TemporaryDirectory(prefix="shardsieve-bench-agent-") as tmp:
        base = Path(tmp)
        servers: list[Any] = []
        try:
            agents: dict[str, list[str]] = {}
            ports: dict[str, int] = {}
            redis_server = pg = None
            if redis_bin is not None:
                redis_server = start_redis(base, {"notify-keyspace-events": "Egxen"}, binary=redis_bin)
                servers.append(redis_server)
                ports[AGENT_REDIS] = free_port()
                agents[AGENT_REDIS] = ["--store", redis_server.url(0), "--metrics-port", str(ports[AGENT_REDIS])]
            if pg_bin is not None:
                # synchronous_commit on (the server default; the test fixture turns it off): a
                # walsender sends only WAL flushed to disk, so with it off a commit reaches the agent
                # up to wal_writer_delay later (PostgreSQL docs, "Asynchronous Commit").
                pg = start_postgres({"synchronous_commit": "on"}, bin_dir=pg_bin)
                servers.append(pg)
                ports[AGENT_PG] = free_port()
                agents[AGENT_PG] = ["--store", prepare_postgres(pg), "--metrics-port", str(ports[AGENT_PG])]
            if not agents:
                return result
            capacity = 2 * max(n_redis, n_pg) + writes
            with LocalCluster(base / "fleet", nodes=0, capacity=capacity, push_interval_ms=push_interval_ms,
                              heartbeat_ms=250, agents=agents,
                              extra_coordinator_args=["--auto-rebuild", "false"]) as cluster:
                if redis_server is not None:
                    result["redis"] = measure_redis(cluster, redis_server, ports[AGENT_REDIS], n_redis, writes,
                                                    push_interval_ms, rounds, log)
                if pg is not None:
                    result["postgresql"] = measure_postgres(cluster, pg, base / "fleet" / AGENT_PG, ports[AGENT_PG],
                                                            n_pg, writes, push_interval_ms, rounds, log)
        finally:
            for server in servers:
                server.remove() if hasattr(server, "remove") else server.stop()
    return result


def targets(result: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """Each target with its bound and whether the run met it (stores not measured are left out)."""
    bound = result["push_interval_ms"] + 100.0
    out: dict[str, dict[str, Any]] = {}
    for store in ("redis", "postgresql"):
        figures = result[store]
        if figures is None:
            continue
        for name, op, limit in (("absorbed_vs_accept", ">=", 0.5), ("change_to_routable_p99_ms", "<=", bound)):
            value = figures[name]
            out[f"{store}.{name}"] = {"value": value, "op": op, "bound": limit,
                                      "met": bool(value >= limit if op == ">=" else value <= limit)}
    return out


@click.command("agent")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object instead of the text report.")
@click.option("--redis-keys", type=click.IntRange(min=1000), default=200_000, show_default=True,
              help="New keys the pipelined writer puts into Redis (each rate and memory figure).")
@click.option("--postgres-rows", type=click.IntRange(min=1000), default=100_000, show_default=True,
              help="New rows the batched writer inserts into PostgreSQL.")
@click.option("--writes", type=click.IntRange(min=1), default=100, show_default=True,
              help="Single changes timed for change -> routable, per store.")
@click.option("--push-interval-ms", type=click.IntRange(min=1), default=50, show_default=True,
              help="The agents' push interval (ms).")
@click.option("--only", type=click.Choice(["redis", "postgresql"]), default=None,
              help="Measure one store only (default: both).")
def bench_agent(as_json: bool, redis_keys: int, postgres_rows: int, writes: int, push_interval_ms: int,
                only: str | None) -> None:
    """Agents on real Redis and PostgreSQL servers under a real coordinator: changes absorbed
    per second against the rate the store accepts them, change -> routable latency, and memory
    per key."""
    log = (lambda s: None) if as_json else click.echo
    log(f"shardsieve bench agent: real servers, agents and a coordinator on loopback "
        f"(push interval {push_interval_ms} ms)")
    stores = (only,) if only else ("redis", "postgresql")
    result = run_bench(redis_keys, postgres_rows, writes, push_interval_ms, log, stores)
    result["targets"] = targets(result)
    if as_json:
        click.echo(json.dumps(result, indent=2, sort_keys=True))
        return
    log("")
    for name, t in result["targets"].items():
        log(f"  {name:38s} {t['value']:>10.3f}  target {t['op']} {t['bound']:g}  {'met' if t['met'] else 'NOT MET'}")
    sys.stdout.flush()
