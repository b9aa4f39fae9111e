"""`shardsieve bench fleet`: one real coordinator process against a fleet of N simulated nodes.

What runs, each part in a process of its own so the coordinator's CPU is its own:
- the coordinator (shardsieve.testing.procs), its settings chosen for the fleet size by
  `plan_fleet` (printed with the reason for each);
- the simulated nodes (`_simulator_main`, one process per SIM_NODES_PER_PROCESS nodes, at nice 10): each
  node is a `StreamedFeed` (shardsieve/testing/replica_feed.py) with its own Bloom filter and
  its own grpc.aio channel, speaking the real sync protocol on a real FilterSync stream: Hello,
  a snapshot, deltas carrying real keys, heartbeats; it answers NeedSnapshot with a snapshot and
  reconnects after a refused stream, as a node does. Filters are 1/4 full of random bits (two
  random bytes ANDed) plus a few named keys, their key count the estimate from the fill
  (shardsieve/sizing.py); every snapshot is encoded before the fleet connects, so the timed
  connect is the coordinator absorbing N snapshots at once;
- the Locate client (`_client_main`): single-key Locate and 1,000-key LocateBatch of the
  nodes' named keys, paced, one call at a time, timed around each call;
- this process: the write -> routable poller and the bookkeeping.

Each fleet size runs with its own coordinator: N = 8 first (the baseline, measured side by side
in the same run), then N. Per size: the connect (all N nodes connect at once; seconds until every
snapshot is acknowledged, streams refused at admission), coordinator memory (/proc/PID/status
VmRSS once synced, VmHWM the peak) against the sum of m/8 over the fleet's filters, then a
measured window of `--duration` s during which every node heartbeats, the writing nodes cut
deltas and the client and the poller call the Router:
- Locate / LocateBatch p50 / p99 (client-side, over loopback gRPC);
- write -> routable: a writing node cuts a delta carrying a new key at time t (monotonic clock:
  CLOCK_MONOTONIC is one clock for every process of the host, clock_gettime(2)); the poller
  sends LocateBatch calls of each writing node's next unseen delta key, one every 20
  ms apart, and the key is routable at the arrival of the first reply that lists the node as
  not stale. The figure includes up to one poll round (POLL_PAUSE_S plus the call) on top of the
  coordinator's own delay;
- deltas and heartbeats absorbed per second, counted from the Acks the nodes received (the
  coordinator answers each delta and heartbeat with one; a delta is absorbed when an Ack
  reaches its sequence), and coordinator CPU seconds per delta absorbed (/proc/PID/stat utime +
  stime over the window, proc(5); the window's Locate traffic is included).
"""

from __future__ import annotations

import asyncio
import heapq
import json
import math
import multiprocessing
import os
import random
import sys
import tempfile
import threading
import time
from dataclasses import asdict, dataclass, field
from multiprocessing.connection import Connection
from pathlib import Path
from typing import Any, Callable

import click
import numpy as np

MIB = 1 << 20
HASHES = 7                   # the optimum for a 1 % target at capacity (shardsieve/sizing.py optimal_hashes)
TARGET_FPR = 0.01
NAMED_KEYS = 8               # keys per node the Locate client looks up (each lists its node)
BATCH_KEYS = 1000
LOCATE_EVERY_S = 0.005       # the client's pace: one single-key Locate every 5 ms ...
BATCH_EVERY_S = 0.2          # ... and one 1,000-key LocateBatch every 200 ms, one call at a time
POLL_PAUSE_S = 0.02          # the write -> routable poller's pause between LocateBatch calls
SIMULATOR_NICE = 10          # the simulated nodes yield the CPU to the coordinator and the client (nice(2))
BASELINE_NODES = 8
SIM_NODES_PER_PROCESS = 2500
CONNECT_TIMEOUT_S = 600.0

# Targets on the 2-core development machine (the task's figures).
LOCATE_P99_MS = 10.0
LOCATE_P99_RATIO = 3.0
ROUTABLE_PUSH_INTERVALS = 3.0
MEMORY_FACTOR = 1.2
MEMORY_ALLOWANCE = 200 * MIB

# Sizing rules (docs/coordinator.md, "Sizing settings for large fleets").
NODE_HEARTBEAT_MS = 1000         # the node's default heartbeat-ms
HEARTBEATS_PER_S = 500           # heartbeats a coordinator is planned to absorb per second
STALE_HEARTBEATS = 3             # stale-after-s spans this many heartbeat intervals
DEFAULT_STALE_AFTER_S = 2.0      # the coordinator's default
DEFAULT_MAX_SYNC_STREAMS = 4096
DEFAULT_MAX_PENDING_STREAMS = 256
DEFAULT_HELLO_TIMEOUT_MS = 5000
HELLO_WAIT_PER_NODE_MS = 10      # a Hello may queue behind every other node's Hello and snapshot
DEFAULT_MAX_STREAMS_PER_PEER = 64
DEFAULT_MONITOR_INTERVAL_S = 1.0
MONITOR_NODES_PER_S = 1000       # nodes the monitor's pass reads per second of its interval


# --------------------------------------------------------------------------- the plan


@dataclass(frozen=True)
class FleetPlan:
    """One fleet's shape and the coordinator settings chosen for its size (with the reasons)."""

    nodes: int
    bits: int
    writers: int
    write_rate: float                 # keys per second per writing node
    push_interval_ms: int
    heartbeat_ms: int
    stale_after_s: float
    max_sync_streams: int
    max_pending_streams: int
    max_streams_per_peer: int
    hello_timeout_ms: int
    monitor_interval_s: float
    reasons: dict[str, str] = field(default_factory=dict)

    @property
    def keys_per_delta(self) -> int:
        """Keys a writing node's delta carries: what it writes in one push interval (at least one)."""
        return max(1, int(self.write_rate * self.push_interval_ms / 1000.0 + 0.5))

    @property
    def delta_interval_s(self) -> float:
        """A writing node cuts a delta every push interval, or less often when it writes slower."""
        return max(self.push_interval_ms / 1000.0, self.keys_per_delta / self.write_rate)

    def writer_indices(self) -> list[int]:
        """The writing nodes, spread evenly over the fleet."""
        return sorted({i * self.nodes // self.writers for i in range(self.writers)})

    def coordinator_args(self) -> list[str]:
        return ["--stale-after-s", f"{self.stale_after_s:g}", "--max-sync-streams", str(self.max_sync_streams),
                "--max-pending-streams", str(self.max_pending_streams),
                "--max-streams-per-peer", str(self.max_streams_per_peer),
                "--hello-timeout-ms", str(self.hello_timeout_ms),
                "--monitor-interval-s", f"{self.monitor_interval_s:g}"]


def plan_fleet(nodes: int, *, bits: int = 1 << 20, writers_share: float = 0.1, write_rate: float = 5.0,
               push_interval_ms: int = 50, heartbeat_ms: int | None = None) -> FleetPlan:
    """The fleet's shape and the coordinator settings that scale with it (the rules of
    docs/coordinator.md, "Sizing settings for large fleets")."""
    reasons: dict[str, str] = {}
    if heartbeat_ms is None:
        heartbeat_ms = max(NODE_HEARTBEAT_MS, math.ceil(nodes * 1000 / HEARTBEATS_PER_S))
        reasons["heartbeat-ms"] = (f"the nodes' heartbeat interval: N / interval heartbeats per second reach the "
                                   f"coordinator, each a message in and an Ack out; kept at most {HEARTBEATS_PER_S}/s "
                                   f"(the node default {NODE_HEARTBEAT_MS} ms up to {HEARTBEATS_PER_S} nodes)")
    else:
        reasons["heartbeat-ms"] = "given (--heartbeat-ms)"
    stale = max(DEFAULT_STALE_AFTER_S, STALE_HEARTBEATS * heartbeat_ms / 1000.0)
    reasons["stale-after-s"] = (f"{STALE_HEARTBEATS} heartbeat intervals (at least the default "
                                f"{DEFAULT_STALE_AFTER_S:g} s): a node turns stale after two heartbeats in a row "
                                "went missing, not when one is late behind a busy event loop")
    max_sync = max(DEFAULT_MAX_SYNC_STREAMS, 2 * nodes)
    reasons["max-sync-streams"] = ("every node's stream plus room for each to reconnect (a takeover holds two "
                                   f"streams for a moment): max({DEFAULT_MAX_SYNC_STREAMS}, 2 N)")
    max_pending = max(DEFAULT_MAX_PENDING_STREAMS, nodes)
    reasons["max-pending-streams"] = ("a coordinator restart brings every node back at once, and their Hellos "
                                      f"queue behind the snapshots: max({DEFAULT_MAX_PENDING_STREAMS}, N)")
    hello_timeout = max(DEFAULT_HELLO_TIMEOUT_MS, HELLO_WAIT_PER_NODE_MS * nodes)
    reasons["hello-timeout-ms"] = (f"max({DEFAULT_HELLO_TIMEOUT_MS}, {HELLO_WAIT_PER_NODE_MS} ms x N): when all "
                                   "connect at once a Hello waits behind the other nodes' Hellos and snapshots")
    monitor = max(DEFAULT_MONITOR_INTERVAL_S, nodes / MONITOR_NODES_PER_S)
    reasons["monitor-interval-s"] = (f"the monitor's pass reads every node on the event loop: max("
                                     f"{DEFAULT_MONITOR_INTERVAL_S:g}, N / {MONITOR_NODES_PER_S}) s keeps its share "
                                     "of the loop the same at any fleet size")
    per_peer = max(DEFAULT_MAX_STREAMS_PER_PEER, nodes + BASELINE_NODES)
    reasons["max-streams-per-peer"] = ("the simulated nodes share one host (a real fleet has one node per host: "
                                       "keep the default there)")
    writers = max(1, round(nodes * writers_share))
    return FleetPlan(nodes=nodes, bits=bits, writers=writers, write_rate=write_rate,
                     push_interval_ms=push_interval_ms, heartbeat_ms=heartbeat_ms, stale_after_s=stale,
                     max_sync_streams=max_sync, max_pending_streams=max_pending, max_streams_per_peer=per_peer,
                     hello_timeout_ms=hello_timeout, monitor_interval_s=monitor, reasons=reasons)


# --------------------------------------------------------------------------- names of the fleet


def node_name(i: int) -> str:
    return f"node-fleet-{i:05d}"


def named_key(i: int, j: int) -> bytes:
    return f"lot-{i:05d}-{j:02d}".encode()


def delta_key(i: int, delta: int, q: int = 0) -> bytes:
    """Key q of writing node i's delta number `delta` (q = 0 is the one the poller follows)."""
    return f"new-{i:05d}-{delta:07d}-{q}".encode()


# --------------------------------------------------------------------------- /proc readings


def proc_memory(pid: int) -> dict[str, int]:
    """VmRSS and VmHWM of a process in bytes (proc(5), /proc/PID/status, in kB)."""
    out = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        name, _, value = line.partition(":")
        if name in ("VmRSS", "VmHWM"):
            out[name] = int(value.split()[0]) * 1024
    return out


def proc_cpu_s(pid: int) -> float:
    """utime + stime of a process in seconds (proc(5), /proc/PID/stat fields 14 and 15, clock ticks)."""
    text = Path(f"/proc/{pid}/stat").read_text()
    fields = text[text.rindex(")") + 2:].split()     # the command name may hold spaces
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def percentile(values: list[float], p: float) -> float:
    return float(np.percentile(np.asarray(values), p)) if values else float("nan")


# --------------------------------------------------------------------------- the simulated nodes


@dataclass(frozen=True)
class SimSpec:
    """What one simulator process plays: nodes first..last-1 of the plan's fleet."""

    address: str
    plan: FleetPlan
    first: int
    last: int
    seed: int


def _simulator_main(conn: Connection, spec: SimSpec) -> None:
    """Entry of a simulator process: commands in on `conn`, results out. It runs at a lower
    priority, so on a machine short of cores the coordinator's CPU stays its own."""
    os.nice(SIMULATOR_NICE)
    try:
        asyncio.run(_Simulator(conn, spec).serve())
    except KeyboardInterrupt:
        pass


class _Simulator:
    def __init__(self, conn: Connection, spec: SimSpec) -> None:
        self.conn = conn
        self.spec = spec
        self.plan = spec.plan
        self.feeds: list[Any] = []
        self.channels: list[Any] = []
        writers = set(self.plan.writer_indices())
        self.writers = [i for i in range(spec.first, spec.last) if i in writers]
        self.writing = False
        self.next_delta: dict[int, int] = {i: 0 for i in self.writers}
        self.cuts: list[tuple[int, int, float]] = []
        self.heartbeats_sent = 0
        self.deltas_sent = 0
        self.refused: dict[str, int] = {}
        self.refusal_detail: dict[str, str] = {}
        self.reconnects = 0
        self._tasks: set[asyncio.Task[Any]] = set()

    async def serve(self) -> None:
        loop = asyncio.get_running_loop()
        while True:
            cmd = await loop.run_in_executor(None, self.conn.recv)
            if cmd[0] == "prepare":
                self.conn.send(self.prepare())
            elif cmd[0] == "connect":
                self.conn.send(await self.connect())
            elif cmd[0] == "window":
                self.conn.send(await self.window(float(cmd[1])))
            elif cmd[0] == "stop":
                await self.stop()
                self.conn.send({"stopped": True})
                return

    def feed(self, i: int) -> Any:
        return self.feeds[i - self.spec.first]

    def prepare(self) -> dict[str, Any]:
        """Every node's filter and its encoded snapshot, before anything is timed."""
        import grpc

        from shardsieve.bloom import BloomFilter
        from shardsieve.geometry import Geometry
        from shardsieve.hashing import positions
        from shardsieve.sizing import capacity_for, estimated_keys
        from shardsieve.testing.replica_feed import StreamedFeed

        t0 = time.perf_counter()
        geometry = Geometry(bits=self.plan.bits, hashes=HASHES)
        capacity = capacity_for(geometry.bits, geometry.hashes, TARGET_FPR)
        # each node its own connection, as separate node processes have (gRPC shares one between
        # channels of the same target and options in a process unless each keeps its own pool)
        options = [("grpc.max_send_message_length", 64 << 20), ("grpc.max_receive_message_length", 64 << 20),
                   ("grpc.use_local_subchannel_pool", 1)]
        for i in range(self.spec.first, self.spec.last):
            rng = np.random.default_rng((self.spec.seed, i))
            size = geometry.byte_size
            background = rng.integers(0, 256, size, dtype=np.uint8) & rng.integers(0, 256, size, dtype=np.uint8)
            bloom = BloomFilter.from_bytes(geometry, background.tobytes())
            bloom.add_positions(positions([named_key(i, j) for j in range(NAMED_KEYS)], geometry))
            keys = int(estimated_keys(geometry.bits, geometry.hashes, bloom.set_count()))
            channel = grpc.aio.insecure_channel(self.spec.address, options=options)
            feed = StreamedFeed(channel, node_name(i), bloom, address=f"127.0.0.1:{20000 + i % 40000}",
                                capacity=capacity, key_count=keys)
            feed.feed.encoded()
            self.channels.append(channel)
            self.feeds.append(feed)
        return {"prepare_s": time.perf_counter() - t0}

    async def connect(self) -> dict[str, Any]:
        """Every node connects at once; returns when each has its snapshot acknowledged."""
        t0 = time.monotonic()
        for feed in self.feeds:
            feed.connect()
        self._spawn(self._drive())
        deadline = t0 + CONNECT_TIMEOUT_S
        retry_at: dict[int, float] = {}
        jitter = random.Random(self.spec.seed)
        while True:
            now = time.monotonic()
            waiting = 0
            for n, feed in enumerate(self.feeds):
                if feed.acked.is_set() and feed.open:
                    continue
                waiting += 1
                if feed.ended is not None and not feed.open:
                    if n not in retry_at:       # refused (admission, Hello deadline): back off, retry
                        code = feed.ended.code.name
                        self.refused[code] = self.refused.get(code, 0) + 1
                        self.refusal_detail.setdefault(code, feed.ended.details[:200])
                        retry_at[n] = now + jitter.uniform(0.2, 1.0)
                    elif now >= retry_at[n]:
                        del retry_at[n]
                        self.reconnects += 1
                        feed.connect()
            if not waiting:
                break
            if now > deadline:
                raise RuntimeError(f"{waiting} simulated nodes not synced after {CONNECT_TIMEOUT_S:.0f} s")
            await asyncio.sleep(0.02)
        return {"connect_s": time.monotonic() - t0, "refused": dict(self.refused), "reconnects": self.reconnects,
                "refusal_detail": dict(self.refusal_detail)}

    async def _drive(self) -> None:
        """Heartbeats of every node and, while `writing`, the writing nodes' deltas, from one timer heap."""
        plan = self.plan
        beat = plan.heartbeat_ms / 1000.0
        jitter = random.Random(self.spec.seed + 1)
        now = time.monotonic()
        due: list[tuple[float, int, int]] = [(now + jitter.uniform(0, beat), 0, i)
                                             for i in range(self.spec.first, self.spec.last)]
        heapq.heapify(due)
        writer_due: list[tuple[float, int, int]] = []
        was_writing = False
        while True:
            now = time.monotonic()
            if self.writing and not was_writing:
                writer_due = [(now + jitter.uniform(0, plan.delta_interval_s), 1, i) for i in self.writers]
                heapq.heapify(writer_due)
            was_writing = self.writing
            while due and due[0][0] <= now:
                _, _, i = heapq.heappop(due)
                feed = self.feed(i)
                if feed.open:
                    feed.heartbeat()
                    self.heartbeats_sent += 1
                heapq.heappush(due, (now + beat, 0, i))
            while self.writing and writer_due and writer_due[0][0] <= now:
                _, _, i = heapq.heappop(writer_due)
                feed = self.feed(i)
                j = self.next_delta[i]
                self.next_delta[i] = j + 1
                feed.add([delta_key(i, j, q) for q in range(plan.keys_per_delta)])
                self.cuts.append((i, j, time.monotonic()))
                self.deltas_sent += 1
                heapq.heappush(writer_due, (now + plan.delta_interval_s, 1, i))
            nxt = min(due[0][0] if due else now + 0.05, writer_due[0][0] if self.writing and writer_due else now + 0.05)
            await asyncio.sleep(max(0.0, min(nxt - time.monotonic(), 0.05)))

    def _counts(self) -> dict[str, Any]:
        return {"acks": sum(f.acks for f in self.feeds), "sequence": sum(f.acked_position[1] for f in self.feeds),
                "heartbeats_sent": self.heartbeats_sent, "deltas_sent": self.deltas_sent,
                "need_snapshots": sum(f.need_snapshots for f in self.feeds),
                "streams_ended": sum(1 for f in self.feeds if not f.open)}

    async def window(self, duration: float) -> dict[str, Any]:
        """The measured window: writers on for `duration` s; Acks counted over it, plus a grace
        for the last deltas' Acks."""
        before = self._counts()
        self.cuts = []
        t0 = time.monotonic()
        self.writing = True
        await asyncio.sleep(duration)
        self.writing = False
        t1 = time.monotonic()
        after = self._counts()
        expected = {i: self.next_delta[i] for i in self.writers}
        return {"t0": t0, "t1": t1, "before": before, "after": after, "cuts": self.cuts, "next_delta": expected}

    async def stop(self) -> None:
        for task in self._tasks:
            task.cancel()
        for feed in self.feeds:
            if feed.open:
                await feed.close()
        for channel in self.channels:
            await channel.close()

    def _spawn(self, coro: Any) -> None:
        task = asyncio.ensure_future(coro)
        self._tasks.add(task)


# --------------------------------------------------------------------------- the Locate client


def _client_main(conn: Connection, address: str, nodes: int, seed: int) -> None:
    """Entry of the client process: single-key Locate and LocateBatch of the nodes' named keys,
    paced, one call at a time (whichever is the longer overdue first, so slow batches cannot
    starve the single-key calls); every reply checked to list the key's node."""
    import grpc

    from shardsieve.v1 import routing_pb2, routing_pb2_grpc

    channel = grpc.insecure_channel(address, options=[("grpc.max_receive_message_length", 64 << 20)])
    stub = routing_pb2_grpc.RouterStub(channel)
    rng = random.Random(seed)
    stub.Locate(routing_pb2.LocateRequest(key=named_key(0, 0)), timeout=30)   # connected and warm
    conn.send({"ready": True})
    while True:
        cmd = conn.recv()
        if cmd[0] != "window":
            break
        duration = float(cmd[1])
        single: list[float] = []
        batch: list[float] = []
        missing = 0
        stale_listed = 0
        end = time.monotonic() + duration
        next_single = next_batch = time.monotonic()
        while True:
            now = time.monotonic()
            if now >= end:
                break
            if now >= next_batch and next_batch <= next_single:   # the longer overdue goes first
                owners = [rng.randrange(nodes) for _ in range(BATCH_KEYS)]
                req = routing_pb2.LocateBatchRequest(keys=[named_key(i, rng.randrange(NAMED_KEYS)) for i in owners])
                t0 = time.perf_counter()
                reply = stub.LocateBatch(req, timeout=30)
                batch.append((time.perf_counter() - t0) * 1000.0)
                for i, result in zip(owners, reply.results):
                    names = {c.node_id for c in result.candidates}
                    missing += node_name(i) not in names
                    stale_listed += any(c.stale for c in result.candidates)
                next_batch = max(next_batch + BATCH_EVERY_S, time.monotonic())
            elif now >= next_single:
                i = rng.randrange(nodes)
                t0 = time.perf_counter()
                reply = stub.Locate(routing_pb2.LocateRequest(key=named_key(i, rng.randrange(NAMED_KEYS))), timeout=30)
                single.append((time.perf_counter() - t0) * 1000.0)
                missing += node_name(i) not in {c.node_id for c in reply.candidates}
                stale_listed += any(c.stale for c in reply.candidates)
                next_single = max(next_single + LOCATE_EVERY_S, time.monotonic())
            else:
                time.sleep(max(0.0, min(next_single, next_batch) - time.monotonic()))
        conn.send({"single_ms": single, "batch_ms": batch, "missing": missing, "stale_listed": stale_listed})
    channel.close()


# --------------------------------------------------------------------------- write -> routable


class RoutablePoller:
    """Follows each writing node's next delta: LocateBatch of their first keys, one call every
    POLL_PAUSE_S; a key is routable at the arrival of the first reply listing its node, not stale.
    (A writing node cuts a delta at most every push interval and most are routable before the
    next one, so the next delta is the one to ask for.)"""

    def __init__(self, address: str, plan: FleetPlan) -> None:
        import grpc

        from shardsieve.v1 import routing_pb2, routing_pb2_grpc

        self._pb = routing_pb2
        self._channel = grpc.insecure_channel(address, options=[("grpc.max_receive_message_length", 64 << 20)])
        self._stub = routing_pb2_grpc.RouterStub(self._channel)
        self.writers = plan.writer_indices()
        self.next = {i: 0 for i in self.writers}
        self.seen: dict[tuple[int, int], float] = {}
        self.polls = 0
        self.until: dict[int, int] | None = None     # stop once each writer's deltas below this are seen
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="routable-poller", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def finish(self, until: dict[int, int], timeout: float) -> None:
        """Poll until every delta below `until` is seen, or `timeout` s; then stop."""
        self.until = until
        self._thread.join(timeout)
        self._stop.set()
        self._thread.join(10)
        self._channel.close()

    def _done(self) -> bool:
        until = self.until
        return until is not None and all(self.next[i] >= until.get(i, 0) for i in self.writers)

    def _run(self) -> None:
        while not self._stop.is_set() and not self._done():
            asked = [(i, self.next[i]) for i in self.writers]
            reply = self._stub.LocateBatch(self._pb.LocateBatchRequest(keys=[delta_key(i, j) for i, j in asked]),
                                           timeout=30)
            arrived = time.monotonic()
            self.polls += 1
            for (i, j), result in zip(asked, reply.results):
                if any(c.node_id == node_name(i) and not c.stale for c in result.candidates):
                    self.seen[(i, j)] = arrived
            for i in self.writers:
                while (i, self.next[i]) in self.seen:
                    self.next[i] += 1
            time.sleep(POLL_PAUSE_S)


# --------------------------------------------------------------------------- one fleet


def _spawn(target: Callable[..., None], *args: Any) -> tuple[Any, Connection]:
    ctx = multiprocessing.get_context("spawn")
    parent, child = ctx.Pipe()
    proc = ctx.Process(target=target, args=(child, *args), daemon=True)
    proc.start()
    child.close()
    return proc, parent


def _ask(conns: list[Connection], cmd: tuple[Any, ...], timeout: float) -> list[dict[str, Any]]:
    for conn in conns:
        conn.send(cmd)
    out = []
    for conn in conns:
        if not conn.poll(timeout):
            raise RuntimeError(f"no answer to {cmd[0]!r} within {timeout:.0f} s")
        out.append(conn.recv())
    return out


def _wait_all_fresh(address: str, nodes: int, timeout: float) -> float:
    """Seconds until a Locate of a key no node holds lists no stale node (safe mode lists every
    stale node in every candidate list)."""
    import grpc

    from shardsieve.testing.procs import wait_until
    from shardsieve.v1 import routing_pb2, routing_pb2_grpc

    t0 = time.monotonic()
    with grpc.insecure_channel(address, options=[("grpc.max_receive_message_length", 64 << 20)]) as channel:
        stub = routing_pb2_grpc.RouterStub(channel)

        def fresh() -> bool:
            reply = stub.Locate(routing_pb2.LocateRequest(key=b"no-such-key-in-the-fleet"), timeout=30)
            return not any(c.stale for c in reply.candidates)
        wait_until(fresh, timeout, interval=0.2, message=f"all {nodes} simulated nodes fresh")
    return time.monotonic() - t0


def measure_fleet(plan: FleetPlan, duration: float, workdir: Path, log: Callable[[str], None],
                  seed: int = 1) -> dict[str, Any]:
    """One coordinator, one fleet of plan.nodes simulated nodes: the connect, memory, and the
    measured window (module docstring)."""
    from shardsieve.testing.procs import free_port, shardsieve_argv, start_daemon

    address = f"127.0.0.1:{free_port()}"
    coordinator = start_daemon(shardsieve_argv("coordinator", "--listen", address, *plan.coordinator_args()),
                               workdir / f"coordinator-{plan.nodes}.log", health_address=address, timeout=60)
    procs: list[Any] = []
    sims: list[Connection] = []
    client: Connection | None = None
    try:
        parts = max(1, math.ceil(plan.nodes / SIM_NODES_PER_PROCESS))
        bounds = [plan.nodes * p // parts for p in range(parts + 1)]
        for p in range(parts):
            proc, conn = _spawn(_simulator_main, SimSpec(address, plan, bounds[p], bounds[p + 1], seed))
            procs.append(proc)
            sims.append(conn)
        cproc, client = _spawn(_client_main, address, plan.nodes, seed)
        procs.append(cproc)
        prepared = _ask(sims, ("prepare",), CONNECT_TIMEOUT_S)
        if not client.poll(60):
            raise RuntimeError("the Locate client did not start")
        client.recv()
        pid = coordinator.pid
        idle = proc_memory(pid)
        log(f"  {plan.nodes} nodes: filters and snapshots prepared in {max(p['prepare_s'] for p in prepared):.1f} s; "
            f"coordinator before the fleet connects: RSS {idle['VmRSS'] / MIB:.0f} MiB")
        cpu0 = proc_cpu_s(pid)
        connected = _ask(sims, ("connect",), CONNECT_TIMEOUT_S)
        connect_s = max(c["connect_s"] for c in connected)
        connect_cpu = proc_cpu_s(pid) - cpu0
        refused: dict[str, int] = {}
        refusal_detail: dict[str, str] = {}
        for c in connected:
            for code, n in c["refused"].items():
                refused[code] = refused.get(code, 0) + n
            for code, detail in c["refusal_detail"].items():
                refusal_detail.setdefault(code, detail)
        fresh_s = _wait_all_fresh(address, plan.nodes, 120)
        synced = proc_memory(pid)
        log(f"  {plan.nodes} nodes connected at once: every snapshot acknowledged after {connect_s:.1f} s "
            f"(coordinator CPU {connect_cpu:.1f} s; streams refused and retried: {refused or 'none'}); "
            f"all fresh {fresh_s:.1f} s later")

        poller = RoutablePoller(address, plan)
        poller.start()
        helpers = [proc.pid for proc in procs]
        helpers_start = sum(proc_cpu_s(p) for p in helpers)
        cpu_start, wall_start = proc_cpu_s(pid), time.monotonic()
        client.send(("window", duration))
        windows = _ask(sims, ("window", duration), duration + 120)
        cpu_end, wall_end = proc_cpu_s(pid), time.monotonic()
        helpers_cpu = sum(proc_cpu_s(p) for p in helpers) - helpers_start
        load = os.getloadavg()[0]
        if not client.poll(duration + 120):
            raise RuntimeError("the Locate client did not report")
        located = client.recv()
        until: dict[int, int] = {}
        for w in windows:
            until.update(w["next_delta"])
        poller.finish(until, 10.0 + ROUTABLE_PUSH_INTERVALS * plan.push_interval_ms / 1000.0)
        end = proc_memory(pid)
    finally:
        for conn in sims + ([client] if client is not None else []):
            try:
                conn.send(("stop",))
            except (OSError, ValueError):      # that process is gone already
                pass
        for conn in sims:
            try:
                conn.poll(60)
            except (OSError, ValueError):
                pass
        for proc in procs:
            proc.join(30)
            if proc.is_alive():
                proc.kill()
        coordinator.stop()

    before = {k: sum(w["before"][k] for w in windows) for k in windows[0]["before"]}
    after = {k: sum(w["after"][k] for w in windows) for k in windows[0]["after"]}
    window_s = max(w["t1"] for w in windows) - min(w["t0"] for w in windows)
    deltas_absorbed = after["sequence"] - before["sequence"]
    acks = after["acks"] - before["acks"]
    heartbeats_absorbed = acks - deltas_absorbed
    cpu_s = cpu_end - cpu_start
    cuts = [c for w in windows for c in w["cuts"]]
    routable = []
    early = unseen = 0
    for i, j, t_cut in cuts:
        seen = poller.seen.get((i, j))
        if seen is None:
            unseen += 1
        elif seen < t_cut:
            early += 1          # listed before it was written: a false positive of the node's filter
        else:
            routable.append((seen - t_cut) * 1000.0)
    sum_m8 = plan.nodes * plan.bits // 8
    out: dict[str, Any] = {
        "nodes": plan.nodes, "bits": plan.bits, "writers": plan.writers,
        "write_rate_per_writer": plan.write_rate, "keys_per_delta": plan.keys_per_delta,
        "delta_interval_ms": plan.delta_interval_s * 1000.0,
        "connect_s": connect_s, "connect_cpu_s": connect_cpu, "fresh_after_connect_s": fresh_s,
        "streams_refused": refused, "streams_refused_detail": refusal_detail,
        "rss_idle_bytes": idle["VmRSS"], "rss_synced_bytes": synced["VmRSS"], "hwm_synced_bytes": synced["VmHWM"],
        "rss_end_bytes": end["VmRSS"], "hwm_bytes": end["VmHWM"],
        "sum_m_over_8_bytes": sum_m8,
        "memory_target_bytes": int(MEMORY_FACTOR * sum_m8 + MEMORY_ALLOWANCE),
        "rss_ratio_vs_sum_m_over_8": synced["VmRSS"] / sum_m8,
        "hwm_ratio_vs_sum_m_over_8": end["VmHWM"] / sum_m8,
        "window_s": window_s, "wall_window_s": wall_end - wall_start,
        "locate_p50_ms": percentile(located["single_ms"], 50), "locate_p99_ms": percentile(located["single_ms"], 99),
        "locate_calls": len(located["single_ms"]),
        "locate_batch_p50_ms": percentile(located["batch_ms"], 50),
        "locate_batch_p99_ms": percentile(located["batch_ms"], 99),
        "locate_batch_calls": len(located["batch_ms"]), "locate_batch_keys": BATCH_KEYS,
        "locate_owner_missing": located["missing"], "locate_stale_listed": located["stale_listed"],
        "write_to_routable_p50_ms": percentile(routable, 50), "write_to_routable_p99_ms": percentile(routable, 99),
        "write_to_routable_deltas": len(routable), "write_to_routable_unseen": unseen,
        "write_to_routable_listed_before_cut": early, "routable_polls": poller.polls,
        "deltas_sent": after["deltas_sent"] - before["deltas_sent"],
        "heartbeats_sent": after["heartbeats_sent"] - before["heartbeats_sent"],
        "deltas_absorbed": deltas_absorbed, "heartbeats_absorbed": heartbeats_absorbed,
        "deltas_per_s": deltas_absorbed / window_s, "heartbeats_per_s": heartbeats_absorbed / window_s,
        "need_snapshots_in_window": after["need_snapshots"] - before["need_snapshots"],
        "streams_ended_in_window": after["streams_ended"],
        "coordinator_cpu_s": cpu_s, "coordinator_cpu_share": cpu_s / (wall_end - wall_start),
        "simulator_and_client_cpu_share": helpers_cpu / (wall_end - wall_start), "load_average_1m": load,
        "coordinator_cpu_s_per_delta": cpu_s / deltas_absorbed if deltas_absorbed else float("nan"),
    }
    log(f"  {plan.nodes} nodes, {duration:g} s window: Locate p50 {out['locate_p50_ms']:.2f} / p99 "
        f"{out['locate_p99_ms']:.2f} ms ({out['locate_calls']} calls); LocateBatch of {BATCH_KEYS} p50 "
        f"{out['locate_batch_p50_ms']:.1f} / p99 {out['locate_batch_p99_ms']:.1f} ms; write -> routable p50 "
        f"{out['write_to_routable_p50_ms']:.1f} / p99 {out['write_to_routable_p99_ms']:.1f} ms "
        f"({len(routable)} deltas); {out['deltas_per_s']:.0f} deltas/s and {out['heartbeats_per_s']:.0f} "
        f"heartbeats/s absorbed; coordinator CPU {cpu_s:.1f} s ({out['coordinator_cpu_share']:.0%} of a core), "
        f"{out['coordinator_cpu_s_per_delta'] * 1e6:.0f} us per delta (simulated nodes and client: "
        f"{out['simulator_and_client_cpu_share']:.0%} of a core; load average {load:.1f}); RSS synced {synced['VmRSS'] / MIB:.0f} MiB, "
        f"peak {end['VmHWM'] / MIB:.0f} MiB, sum of m/8 {sum_m8 / MIB:.0f} MiB")
    return out


# --------------------------------------------------------------------------- the command


def verdicts(fleet: dict[str, Any], baseline: dict[str, Any], plan: FleetPlan) -> dict[str, dict[str, Any]]:
    """Each target: its value, bound and whether it is met."""
    targets = {
        "locate_p99_ms": (fleet["locate_p99_ms"], LOCATE_P99_MS, "Locate p99 at N (ms)"),
        "locate_p99_ratio_vs_8": (fleet["locate_p99_ms"] / baseline["locate_p99_ms"], LOCATE_P99_RATIO,
                                  f"Locate p99 at N / at {BASELINE_NODES}"),
        "write_to_routable_p99_ms": (fleet["write_to_routable_p99_ms"],
                                     ROUTABLE_PUSH_INTERVALS * plan.push_interval_ms,
                                     f"write -> routable p99 (ms) vs {ROUTABLE_PUSH_INTERVALS:g} x push interval"),
        "rss_synced_bytes": (fleet["rss_synced_bytes"], fleet["memory_target_bytes"],
                             f"coordinator RSS once synced vs {MEMORY_FACTOR:g} x sum m/8 + "
                             f"{MEMORY_ALLOWANCE // MIB} MiB"),
    }
    return {name: {"value": value, "op": "<=", "bound": bound, "what": what,
                   "met": bool(value <= bound)} for name, (value, bound, what) in targets.items()}


@click.command("fleet")
@click.option("--nodes", type=click.IntRange(min=1, max=100_000), default=1000, show_default=True,
              help="Simulated nodes in the fleet (the baseline of 8 runs first).")
@click.option("--bits", type=click.IntRange(min=64, max=1 << 30), default=1 << 20, show_default=True,
              help="Bits of every node's filter.")
@click.option("--writers-share", type=click.FloatRange(min=0.0, max=1.0, min_open=True), default=0.1,
              show_default=True, help="Share of the nodes that write during the measured window.")
@click.option("--write-rate", type=click.FloatRange(min=0.1, max=10_000), default=5.0, show_default=True,
              help="Keys written per second by each writing node.")
@click.option("--push-interval-ms", type=click.IntRange(min=1, max=60_000), default=50, show_default=True,
              help="Push interval of the nodes: a writing node cuts a delta at most this often.")
@click.option("--heartbeat-ms", type=click.IntRange(min=10, max=600_000), default=None,
              help="Heartbeat interval of the nodes (default: chosen for the fleet size, printed).")
@click.option("--duration", type=click.FloatRange(min=0.5, max=3600), default=20.0, show_default=True,
              help="Seconds of the measured window, per fleet size.")
@click.option("--seed", default=1, show_default=True, help="Random seed of the filters and the lookups.")
@click.option("--log-dir", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="Keep the coordinators' logs in this directory (default: a temporary one, removed).")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object instead of the text report.")
def bench_fleet(nodes: int, bits: int, writers_share: float, write_rate: float, push_interval_ms: int,
                heartbeat_ms: int | None, duration: float, seed: int, log_dir: Path | None, as_json: bool) -> None:
    """A real coordinator process against N simulated nodes on real sync streams: memory, Locate
    latency, write -> routable, deltas and heartbeats absorbed, against a fleet of 8 run first."""
    log = (lambda s: None) if as_json else click.echo
    plans = {size: plan_fleet(size, bits=bits, writers_share=writers_share, write_rate=write_rate,
                              push_interval_ms=push_interval_ms, heartbeat_ms=heartbeat_ms)
             for size in (BASELINE_NODES, nodes)}
    plan = plans[nodes]
    log(f"shardsieve bench fleet: {nodes} nodes of {bits:,} bits ({plan.writers} writing {write_rate:g} keys/s "
        f"each, {plan.keys_per_delta} key(s) per delta every {plan.delta_interval_s * 1000:.0f} ms; push interval "
        f"{push_interval_ms} ms), baseline {BASELINE_NODES} nodes first")
    log("  settings for the fleet size (coordinator, and the simulated nodes' heartbeat):")
    for name, value in (("heartbeat-ms", plan.heartbeat_ms), ("stale-after-s", plan.stale_after_s),
                        ("max-sync-streams", plan.max_sync_streams),
                        ("max-pending-streams", plan.max_pending_streams),
                        ("hello-timeout-ms", plan.hello_timeout_ms),
                        ("monitor-interval-s", plan.monitor_interval_s),
                        ("max-streams-per-peer", plan.max_streams_per_peer)):
        log(f"    {name:21s} {value!s:>8}  {plan.reasons[name]}")
    with tempfile.TemporaryDirectory(prefix="shardsieve-fleet-") as tmp:
        workdir = log_dir or Path(tmp)
        workdir.mkdir(parents=True, exist_ok=True)
        baseline = measure_fleet(plans[BASELINE_NODES], duration, workdir, log, seed)
        fleet = measure_fleet(plan, duration, workdir, log, seed)
    targets = verdicts(fleet, baseline, plan)
    result = {"nodes": nodes, "baseline_nodes": BASELINE_NODES, "duration_s": duration,
              "settings": {k: v for k, v in asdict(plan).items()}, "baseline": baseline, "fleet": fleet,
              "locate_p99_ratio_vs_8": targets["locate_p99_ratio_vs_8"]["value"],
              "locate_p50_ratio_vs_8": fleet["locate_p50_ms"] / baseline["locate_p50_ms"],
              "targets": targets}
    if as_json:
        click.echo(json.dumps(result, indent=2, sort_keys=True))
        return
    log("")
    log(f"  {'figure':44s} {'N = ' + str(BASELINE_NODES):>12} {'N = ' + str(nodes):>12}")
    rows = [("Locate p50 / p99 (ms)", "locate_p50_ms", "locate_p99_ms", "{:.2f}"),
            (f"LocateBatch {BATCH_KEYS} keys p50 / p99 (ms)", "locate_batch_p50_ms", "locate_batch_p99_ms", "{:.1f}"),
            ("write -> routable p50 / p99 (ms)", "write_to_routable_p50_ms", "write_to_routable_p99_ms", "{:.0f}")]
    for label, a, b, fmt in rows:
        cells = [f"{fmt.format(r[a])} / {fmt.format(r[b])}" for r in (baseline, fleet)]
        log(f"  {label:44s} {cells[0]:>12} {cells[1]:>12}")
    for label, key, fmt, scale in (("deltas absorbed per s", "deltas_per_s", "{:.0f}", 1.0),
                                   ("heartbeats absorbed per s", "heartbeats_per_s", "{:.0f}", 1.0),
                                   ("coordinator CPU per delta (us)", "coordinator_cpu_s_per_delta", "{:.0f}", 1e6),
                                   ("coordinator RSS synced (MiB)", "rss_synced_bytes", "{:.0f}", 1 / MIB),
                                   ("coordinator peak RSS, VmHWM (MiB)", "hwm_bytes", "{:.0f}", 1 / MIB),
                                   ("sum of m/8 (MiB)", "sum_m_over_8_bytes", "{:.1f}", 1 / MIB),
                                   ("RSS / sum of m/8", "rss_ratio_vs_sum_m_over_8", "{:.2f}", 1.0),
                                   ("connect of all nodes at once (s)", "connect_s", "{:.1f}", 1.0)):
        log(f"  {label:44s} {fmt.format(baseline[key] * scale):>12} {fmt.format(fleet[key] * scale):>12}")
    log("")
    for name, t in targets.items():
        shown = (f"{t['value'] / MIB:.0f} MiB <= {t['bound'] / MIB:.0f} MiB" if name.endswith("bytes")
                 else f"{t['value']:.2f} <= {t['bound']:g}")
        log(f"  {t['what']:66s} {shown:>24}  {'met' if t['met'] else 'NOT MET'}")
    sys.stdout.flush()
