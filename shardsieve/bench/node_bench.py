"""`shardsieve bench node`: node write throughput through gRPC vs in-process, and ack-to-push latency.

Side by side in one run, with the same settings (sync level, capacity, push interval):
  1. direct (baseline): `clients` threads call NodeCore.put_many one key at a time in this
     process (store commit + filter update + sequence stamp + group commit, the node's own
     code, on a SQLite store of its own in a temporary directory) -> direct_puts_per_s;
  2. gRPC: a real `shardsieve node` process streaming to an in-process test coordinator (the
     real CoordinatorSync); `clients` threads, each with its own channel, call
     NodeStorage.Put one key at a time -> grpc_puts_per_s and grpc_fraction_of_direct;
  3. ack-to-push: one client puts keys at random intervals; for each put, the time from the
     client receiving its WriteAck(epoch, sequence) to the delta with that sequence arriving
     at the test coordinator (so it includes one loopback hop after leaving the node) ->
     p50/p99 ms, printed beside the push interval (expected scale: a change waits on average
     half an interval for the next cut). A delta that arrived before the ack reached the
     client counts as 0.
The two throughput phases alternate (direct, gRPC, direct, gRPC) and are summed, so a noisy
neighbour on a shared machine hits both about equally.
"""

from __future__ import annotations

import json
import random
import tempfile
import threading
import time
from pathlib import Path
from typing import Any, Callable

import click
import numpy as np


def _run_threads(clients: int, per_client: int, work: Callable[[int, int], None]) -> float:
    """Run work(client, i) for i in range(per_client) on `clients` threads; return elapsed seconds."""
    barrier = threading.Barrier(clients + 1)
    errors: list[BaseException] = []

    def body(c: int) -> None:
        barrier.wait()
        try:
            for i in range(per_client):
                work(c, i)
        except BaseException as exc:  # noqa: BLE001 - reported after the run
            errors.append(exc)

    threads = [threading.Thread(target=body, args=(c,), daemon=True) for c in range(clients)]
    for t in threads:
        t.start()
    barrier.wait()
    start = time.perf_counter()
    for t in threads:
        t.join()
    elapsed = time.perf_counter() - start
    if errors:
        raise errors[0]
    return elapsed


def measure(puts: int = 2000, clients: int = 8, sync_level: str = "full", push_interval_ms: int = 50,
            latency_samples: int = 400, value_bytes: int = 100, seed: int = 1) -> dict[str, Any]:
    import grpc

    from shardsieve.node.core import NodeCore
    from shardsieve.node.pusher import ThreadedPusher
    from shardsieve.node.store import SqliteStore
    from shardsieve.testing.procs import free_port, shardsieve_argv, start_daemon
    from shardsieve.testing.sync_peer import TestCoordinator
    from shardsieve.v1 import storage_pb2, storage_pb2_grpc

    rng = random.Random(seed)
    value = rng.randbytes(value_bytes)
    capacity = max(10_000, 4 * puts)
    with tempfile.TemporaryDirectory(prefix="shardsieve-bench-node-") as tmp, TestCoordinator() as coord:
        port = free_port()
        address = f"127.0.0.1:{port}"
        proc = start_daemon(shardsieve_argv(
            "node", "--id", "bench-node", "--listen", address, "--data", str(Path(tmp) / "grpc-node"),
            "--coordinator", coord.address, "--capacity", str(capacity), "--fpr", "0.01",
            "--push-interval-ms", str(push_interval_ms), "--sync-level", sync_level,
            "--log-format", "text"),
            Path(tmp) / "node.log", health_address=address)
        # The baseline: the same node code (NodeCore: store commit + filter + stamp, group commit,
        # pusher running) on its own SQLite store with the same settings, called in-process.
        direct_store = SqliteStore(Path(tmp) / "direct-node", sync_level)
        core = NodeCore("bench-direct", direct_store, capacity=capacity, target_fpr=0.01,
                        push_interval=push_interval_ms / 1000.0)
        core.load()
        pusher = ThreadedPusher(core, push_interval_ms / 1000.0).start()
        try:
            per_client = max(1, puts // (2 * clients))
            # --- throughput, alternating rounds ---------------------------------------------
            direct_s = grpc_s = 0.0
            direct_n = grpc_n = 0
            channels = [grpc.insecure_channel(address) for _ in range(clients)]
            stubs = [storage_pb2_grpc.NodeStorageStub(ch) for ch in channels]
            for s in stubs:   # connect every channel before timing
                s.Stats(storage_pb2.NodeStatsRequest(), timeout=10)
            for rnd in range(2):
                direct_s += _run_threads(clients, per_client, lambda c, i, r=rnd: core.put_many(
                    [(f"direct/{r}/{c}/{i}".encode(), value)]))
                direct_n += clients * per_client
                grpc_s += _run_threads(clients, per_client, lambda c, i, r=rnd: stubs[c].Put(
                    storage_pb2.PutRequest(key=f"grpc/{r}/{c}/{i}".encode(), value=value), timeout=30))
                grpc_n += clients * per_client
            for ch in channels:
                ch.close()
            direct_rate = direct_n / direct_s
            grpc_rate = grpc_n / grpc_s
            # --- ack-to-push latency ----------------------------------------------------------
            coord.wait_for_node("bench-node", 15)
            arrived: dict[tuple[int, int], float] = {}
            lock = threading.Lock()

            def on_message(msg: Any, when: float) -> None:
                if msg.WhichOneof("body") == "delta":
                    with lock:
                        arrived.setdefault((msg.delta.epoch, msg.delta.sequence), when)

            coord.on_message = on_message
            acks: list[tuple[int, int, float]] = []
            with grpc.insecure_channel(address) as ch:
                stub = storage_pb2_grpc.NodeStorageStub(ch)
                stub.Stats(storage_pb2.NodeStatsRequest(), timeout=10)
                for i in range(latency_samples):
                    a = stub.Put(storage_pb2.PutRequest(key=f"lat/{i}".encode(), value=value), timeout=10)
                    acks.append((a.epoch, a.sequence, time.monotonic()))
                    # random spacing so puts land at every phase of the push timer
                    time.sleep(rng.uniform(0, 2 * push_interval_ms / 1000.0 / 3))
            deadline = time.monotonic() + 10 + 5 * push_interval_ms / 1000.0
            while time.monotonic() < deadline:
                with lock:
                    if all((e, s) in arrived for e, s, _ in acks):
                        break
                time.sleep(push_interval_ms / 1000.0)
            coord.on_message = None
            with lock:
                lat = [max(0.0, arrived[(e, s)] - t) * 1000.0 for e, s, t in acks if (e, s) in arrived]
            missing = len(acks) - len(lat)
        finally:
            pusher.stop()
            direct_store.close()
            proc.stop()
    arr = np.asarray(lat) if lat else np.asarray([float("nan")])
    return {
        "grpc_puts_per_s": round(grpc_rate, 1),
        "direct_puts_per_s": round(direct_rate, 1),
        "grpc_fraction_of_direct": round(grpc_rate / direct_rate, 3),
        "ack_to_push_p50_ms": round(float(np.percentile(arr, 50)), 2),
        "ack_to_push_p99_ms": round(float(np.percentile(arr, 99)), 2),
        "push_interval_ms": push_interval_ms,
        "clients": clients,
        "puts_per_mode": grpc_n,
        "latency_samples": len(lat),
        "latency_samples_never_pushed": missing,
        "sync_level": sync_level,
        "value_bytes": value_bytes,
    }


@click.command("node")
@click.option("--puts", type=click.IntRange(min=1), default=2000, show_default=True, help="Puts per mode (direct and gRPC), over two rounds.")
@click.option("--clients", type=click.IntRange(min=1), default=8, show_default=True, help="Concurrent writers in both modes.")
@click.option("--sync-level", type=click.Choice(["full", "normal"]), default="full", show_default=True,
              help="Store durability of the benchmarked node (the node's default is full).")
@click.option("--push-interval-ms", type=click.IntRange(min=1), default=50, show_default=True,
              help="The node's push interval (ms).")
@click.option("--latency-samples", type=click.IntRange(min=1), default=400, show_default=True, help="Puts timed for ack-to-push latency.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object instead of a table.")
def bench_node(puts: int, clients: int, sync_level: str, push_interval_ms: int, latency_samples: int,
               as_json: bool) -> None:
    """Node puts/s through gRPC (8 clients) vs the same store written in-process, and the time
    from an acknowledged put to the delta carrying it leaving the node."""
    for name, val in (("--puts", puts), ("--clients", clients), ("--push-interval-ms", push_interval_ms),
                      ("--latency-samples", latency_samples)):
        if val < 1:
            raise click.BadParameter(f"must be at least 1, got {val}", param_hint=name)
    result = measure(puts, clients, sync_level, push_interval_ms, latency_samples)
    if as_json:
        click.echo(json.dumps(result))
        return
    from rich.console import Console
    from rich.table import Table

    table = Table(title=f"storage node, {clients} clients, sync level {sync_level}")
    table.add_column("measure")
    table.add_column("value", justify="right")
    table.add_row("direct puts/s (in-process NodeCore, baseline)", f"{result['direct_puts_per_s']:,.0f}")
    table.add_row("gRPC puts/s", f"{result['grpc_puts_per_s']:,.0f}")
    table.add_row("gRPC / direct", f"{result['grpc_fraction_of_direct']:.3f}")
    table.add_row("ack-to-push p50 (ms)", f"{result['ack_to_push_p50_ms']:.2f}")
    table.add_row("ack-to-push p99 (ms)", f"{result['ack_to_push_p99_ms']:.2f}")
    table.add_row("push interval (ms)", str(result["push_interval_ms"]))
    Console().print(table)
