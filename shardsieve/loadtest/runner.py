"""The I/O half of the load tester: seed nodes directly, wait for routing, read through a coordinator.

Seeding writes to NODES (NodeStorage.BatchPut at the addresses FleetStatus lists), never through
the coordinator, so the coordinator can only learn the keys from the nodes' filter deltas; the
run then waits, with a deadline, until LocateBatch lists each key's owner before reading.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass
from typing import Callable, Sequence

import grpc
import numpy as np

from shardsieve.client import (
    EXIT_FAILURE, EXIT_UNREACHABLE, CandidateUnavailable, ClientError, OperatorClient, ShardsieveError, translate,
    translate_error,
)
from shardsieve.loadtest.report import Tally
from shardsieve.loadtest.workload import LookupStream, place_keys, seed_key

Progress = Callable[[int], None]   # called with the number of items just completed


@dataclass(frozen=True)
class NodeInfo:
    node_id: str
    address: str
    predicted_fpr: float
    wasted_probes: int
    state: str
    stale: bool
    connected: bool
    key_count: int
    epoch: int = 0


def fleet_view(client: OperatorClient) -> dict[str, NodeInfo]:
    reply = client.fleet_status()
    return {n.node_id: NodeInfo(n.node_id, n.address, n.predicted_fpr, n.wasted_probes, n.state,
                                n.stale, n.connected, n.key_count, n.epoch) for n in reply.nodes}


def wait_fleet_ready(client: OperatorClient, timeout_s: float, min_nodes: int = 1) -> dict[str, NodeInfo]:
    """Wait until the coordinator knows >= min_nodes nodes, all connected and none stale."""
    deadline = time.monotonic() + timeout_s
    while True:
        view = fleet_view(client)
        ready = len(view) >= min_nodes and all(n.connected and not n.stale and n.address for n in view.values())
        if ready:
            return view
        if time.monotonic() > deadline:
            bad = [f"{n.node_id} ({n.state})" for n in view.values() if n.stale or not n.connected]
            raise ClientError(
                f"the fleet is not ready after {timeout_s:.0f}s ({len(view)} nodes known; not synced: "
                f"{', '.join(bad) or 'none'}): check `shardsieve status`, then retry", EXIT_FAILURE)
        time.sleep(0.1)


class NodeChannels:
    """One channel + NodeStorage stub per node address (direct access for seeding)."""

    def __init__(self, view: dict[str, NodeInfo], metadata: tuple[tuple[str, str], ...] = (),
                 credentials: grpc.ChannelCredentials | None = None) -> None:
        """`credentials`: the operator's TLS credentials for a TLS fleet (None: plaintext)."""
        from shardsieve.security import make_channel
        from shardsieve.v1 import storage_pb2_grpc
        self.metadata = metadata
        self._channels = {nid: make_channel(info.address, credentials) for nid, info in view.items()}
        self.stubs = {nid: storage_pb2_grpc.NodeStorageStub(ch) for nid, ch in self._channels.items()}
        self.addresses = {nid: info.address for nid, info in view.items()}

    def close(self) -> None:
        for ch in self._channels.values():
            ch.close()

    def call(self, node_id: str, what: str, method: Callable, request: object, timeout_s: float = 30.0):
        try:
            return method(request, timeout=timeout_s, metadata=self.metadata)
        except grpc.RpcError as exc:
            err = translate_error(exc, self.addresses[node_id], f"{what} on node {node_id}")
            if err.exit_code == EXIT_UNREACHABLE:
                err = ClientError(f"cannot reach node {node_id} at {self.addresses[node_id]}: "
                                  f"check it is running (`shardsieve status`)", EXIT_UNREACHABLE)
            raise err from None


def seed(channels: NodeChannels, keys: Sequence[bytes], owners: Sequence[str], value_size: int = 64,
         batch: int = 500, on_progress: Progress | None = None, values: Sequence[bytes] | None = None) -> None:
    """BatchPut every key to its owner node, in batches (filler values unless `values` are given)."""
    from shardsieve.v1 import storage_pb2
    filler = (b"shardsieve-loadtest-" * (value_size // 20 + 1))[:value_size]
    by_node: dict[str, list[tuple[bytes, bytes]]] = {}
    for i, (key, owner) in enumerate(zip(keys, owners)):
        by_node.setdefault(owner, []).append((key, values[i] if values is not None else filler))
    for node_id, items in by_node.items():
        stub = channels.stubs[node_id]
        for i in range(0, len(items), batch):
            chunk = items[i:i + batch]
            req = storage_pb2.BatchPutRequest(items=[storage_pb2.PutRequest(key=k, value=v) for k, v in chunk])
            channels.call(node_id, "BatchPut", stub.BatchPut, req)
            if on_progress:
                on_progress(len(chunk))


def remove_seeded(channels: NodeChannels, keys: Sequence[bytes], owners: Sequence[str], batch: int = 500,
                  on_progress: Progress | None = None) -> int:
    """BatchDelete the keys a run seeded from their owner nodes; returns how many existed."""
    from shardsieve.v1 import storage_pb2
    by_node: dict[str, list[bytes]] = {}
    for key, owner in zip(keys, owners):
        by_node.setdefault(owner, []).append(key)
    removed = 0
    for node_id, node_keys in by_node.items():
        stub = channels.stubs[node_id]
        for i in range(0, len(node_keys), batch):
            chunk = node_keys[i:i + batch]
            reply = channels.call(node_id, "BatchDelete", stub.BatchDelete, storage_pb2.BatchDeleteRequest(keys=chunk))
            removed += sum(1 for ack in reply.acks if ack.created)
            if on_progress:
                on_progress(len(chunk))
    return removed


def scan_existing(channels: NodeChannels, limit: int, on_progress: Progress | None = None,
                  page: int = 1000) -> tuple[list[bytes], list[str]]:
    """Reuse the keys already stored: ScanKeys on every node, page by page in turn, up to `limit`.

    Taking pages in turn keeps the sample spread over the nodes. A key present on several nodes
    is dropped: the coordinator's read would count every holder, so its prediction is not 1 + ...
    """
    from shardsieve.v1 import storage_pb2
    found: dict[bytes, list[str]] = {}
    cursors: dict[str, bytes] = {node_id: b"" for node_id in sorted(channels.stubs)}
    while cursors and len(found) < limit:
        for node_id in list(cursors):
            want = min(page, limit - len(found))
            if want <= 0:
                break
            stub = channels.stubs[node_id]
            reply = channels.call(node_id, "ScanKeys", stub.ScanKeys,
                                  storage_pb2.ScanKeysRequest(limit=want, after=cursors[node_id]))
            for k in reply.keys:
                found.setdefault(k, []).append(node_id)
            if on_progress:
                on_progress(len(reply.keys))
            if reply.done or not reply.keys:
                del cursors[node_id]
            else:
                cursors[node_id] = reply.keys[-1]
    unique = [(k, owners[0]) for k, owners in found.items() if len(owners) == 1][:limit]
    return [k for k, _ in unique], [o for _, o in unique]


def wait_routable(client: OperatorClient, keys: Sequence[bytes], owners: Sequence[str], timeout_s: float,
                  batch: int = 2000, on_progress: Progress | None = None) -> None:
    """Block until LocateBatch lists each key's owner among its candidates, or fail at the deadline."""
    deadline = time.monotonic() + timeout_s
    pending = list(range(len(keys)))
    while pending:
        still: list[int] = []
        for i in range(0, len(pending), batch):
            idx = pending[i:i + batch]
            rows = client.run("LocateBatch", lambda: client.client.locate_many([keys[j] for j in idx]))
            for j, cands in zip(idx, rows):
                if any(c.node_id == owners[j] for c in cands):
                    continue
                still.append(j)
        if on_progress:
            on_progress(len(pending) - len(still))
        pending = still
        if not pending:
            return
        if time.monotonic() > deadline:
            raise ClientError(
                f"{len(pending)} of {len(keys)} seeded keys are still not routed to their node after "
                f"{timeout_s:.0f}s: the nodes' deltas are not reaching the coordinator; check `shardsieve status`",
                EXIT_FAILURE)
        time.sleep(0.05)


def run_reads(client: OperatorClient, stream: LookupStream, tally: Tally, concurrency: int,
              count: int | None = None, duration_s: float | None = None, on_progress: Progress | None = None,
              stop: threading.Event | None = None) -> float:
    """Read through the coordinator from `concurrency` threads until count or duration is reached.

    Returns the elapsed seconds. A connection failure to the coordinator aborts the run
    (ClientError); a lookup whose candidate could not be asked (CandidateUnavailable) is counted
    as an error. Reads go through the application client (`client.client.get`).
    """
    if count is None and duration_s is None:
        raise ValueError("give a lookup count or a duration")
    stop = stop or threading.Event()
    lock = threading.Lock()
    issued = 0
    failure: list[ClientError] = []
    started = time.perf_counter()
    end_at = started + duration_s if duration_s is not None else None
    read = client.client.get

    def next_chunk(size: int = 64):
        nonlocal issued
        with lock:
            if stop.is_set() or failure:
                return []
            if end_at is not None and time.perf_counter() >= end_at:
                return []
            n = size if count is None else min(size, count - issued)
            if n <= 0:
                return []
            issued += n
            return stream.take(n)

    def worker() -> None:
        while True:
            chunk = next_chunk(8 if count is None else 32)
            if not chunk:
                return
            done = 0
            for lk in chunk:
                if end_at is not None and time.perf_counter() >= end_at or stop.is_set():
                    break
                t0 = time.perf_counter()
                try:
                    reply = read(lk.key)
                except CandidateUnavailable:
                    with lock:
                        tally.record_error()
                    done += 1
                    continue
                except ShardsieveError as exc:
                    with lock:
                        failure.append(translate(exc, client.address, "Read"))
                    stop.set()
                    return
                t1 = time.perf_counter()
                with lock:
                    tally.record(lk.owner, lk.key, reply.found, reply.candidates, t1 - t0, t0 - started)
                done += 1
            if on_progress and done:
                on_progress(done)

    threads = [threading.Thread(target=worker, name=f"loadtest-{i}", daemon=True) for i in range(concurrency)]
    for t in threads:
        t.start()
    try:
        for t in threads:
            while t.is_alive():
                t.join(0.2)
    except BaseException:  # Ctrl-C: let the workers finish their current lookup and stop
        stop.set()
        raise
    elapsed = time.perf_counter() - started
    if failure:
        raise failure[0]
    return elapsed


# ---------------------------------------------------------------------------------------------
# A whole run (used by `shardsieve loadtest` and `shardsieve tour`)
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class LoadtestOptions:
    keys: int = 10_000
    reuse: bool = False
    existing_share: float = 0.5
    zipf_s: float = 0.0
    concurrency: int = 8
    count: int | None = None
    duration_s: float | None = 10.0
    value_size: int = 64
    seed: int | None = None
    ready_timeout_s: float = 60.0
    routable_timeout_s: float = 120.0
    confidence: float = 0.999
    keep_keys: bool = False      # leave the seeded lt/<run>/... keys on the nodes afterwards


@dataclass
class LoadtestResult:
    report: dict
    times_s: list[float]
    latency_ms: list[float]


class Phases:
    """Progress hooks; the CLI maps them to rich progress bars, tests leave them silent."""

    def start(self, name: str, total: float | None) -> None: ...
    def advance(self, amount: float) -> None: ...
    def finish(self) -> None: ...


def run_loadtest(client: OperatorClient, opts: LoadtestOptions, phases: Phases | None = None,
                 stop: threading.Event | None = None) -> LoadtestResult:
    """Seed (or reuse) keys, wait until they are routed, read, and build the report. Seeded keys
    are removed from the nodes at the end — also when the run fails or is interrupted — unless
    opts.keep_keys; reused keys are never touched."""
    from shardsieve.loadtest.workload import new_run_id

    phases = phases or Phases()
    rng = np.random.default_rng(opts.seed)
    run_id = new_run_id() if opts.seed is None else f"s{opts.seed}"
    view = wait_fleet_ready(client, opts.ready_timeout_s)
    channels = NodeChannels(view, client.metadata, client.settings.credentials())
    seeded: tuple[list[bytes], list[str]] = ([], [])
    try:
        if opts.reuse:
            phases.start("collecting existing keys", None)
            keys, owners = scan_existing(channels, opts.keys, phases.advance)
            phases.finish()
            if not keys and opts.existing_share > 0:
                raise ClientError("--reuse found no keys on the nodes: seed some first (drop --reuse)", EXIT_FAILURE)
        else:
            phases.start(f"seeding {opts.keys:,} keys on {len(view)} nodes", opts.keys)
            keys = [seed_key(run_id, i) for i in range(opts.keys)]
            owners = place_keys(rng, opts.keys, sorted(view))
            seeded = (keys, owners)   # from here on, whatever happens, they are cleaned up
            seed(channels, keys, owners, value_size=opts.value_size, on_progress=phases.advance)
            phases.finish()
        result = _measure(client, opts, phases, stop, rng, run_id, keys, owners, view)
    except BaseException:
        if seeded[0] and not opts.keep_keys:
            try:
                remove_seeded(channels, *seeded)
            except ClientError:
                pass   # the original failure is the one to report
        raise
    else:
        if seeded[0] and not opts.keep_keys:
            phases.start(f"removing the {len(seeded[0]):,} seeded keys", len(seeded[0]))
            result.report["removed_seeded_keys"] = remove_seeded(channels, *seeded, on_progress=phases.advance)
            phases.finish()
        else:
            result.report["removed_seeded_keys"] = 0
        result.report["kept_seeded_keys"] = bool(seeded[0]) and opts.keep_keys
        result.report["seed_prefix"] = seed_key(run_id, 0).decode().rsplit("/", 1)[0] + "/" if seeded[0] else None
        return result
    finally:
        channels.close()


def _measure(client: OperatorClient, opts: LoadtestOptions, phases: Phases, stop: threading.Event | None,
             rng: np.random.Generator, run_id: str, keys: list[bytes], owners: list[str],
             view: dict[str, NodeInfo]) -> LoadtestResult:
    """Wait until the keys are routed, read through the coordinator, build the report."""
    if keys:
        phases.start("waiting until the coordinator routes every key", len(keys))
        wait_routable(client, keys, owners, opts.routable_timeout_s, on_progress=phases.advance)
        phases.finish()
        # Routing is complete; wait for the fleet to be synced again so no node is listed as stale.
        view = wait_fleet_ready(client, opts.ready_timeout_s)
    fprs = {nid: info.predicted_fpr for nid, info in view.items()}
    tally = Tally(fprs, confidence=opts.confidence)
    stream = LookupStream(rng, keys, owners, run_id, hit_share=opts.existing_share if keys else 0.0,
                          zipf_s=opts.zipf_s)
    if opts.count is not None:
        phases.start(f"{opts.count:,} lookups x {opts.concurrency} threads", opts.count)
    else:
        phases.start(f"reading for {opts.duration_s:g}s x {opts.concurrency} threads", None)
    elapsed = run_reads(client, stream, tally, opts.concurrency, count=opts.count,
                        duration_s=opts.duration_s if opts.count is None else None,
                        on_progress=phases.advance, stop=stop)
    phases.finish()
    after = fleet_view(client)
    wasted = {nid: max(0, after[nid].wasted_probes - info.wasted_probes)
              for nid, info in view.items() if nid in after}
    report = tally.build(elapsed, wasted)
    report["rebuilt_during_run"] = sorted(nid for nid, info in view.items()
                                          if nid in after and after[nid].epoch != info.epoch)
    report["stale_during_run"] = sorted(nid for nid, info in after.items() if info.stale or not info.connected)
    report["seeded"] = 0 if opts.reuse else len(keys)
    report["reused"] = len(keys) if opts.reuse else 0
    report["popularity"] = f"zipf(s={opts.zipf_s:g})" if opts.zipf_s else "uniform"
    report["existing_share"] = opts.existing_share
    report["concurrency"] = opts.concurrency
    return LoadtestResult(report, list(tally.series_t), list(tally.series_latency_ms))
