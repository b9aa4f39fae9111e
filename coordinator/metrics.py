"""Prometheus text metrics of a coordinator, served on a separate port from a private registry.

Event counters are bumped where the event happens: lookups, candidates per lookup and probes on
the request path, delta bytes as the sync stream receives them, snapshots and rebuild requests
from the sync events (`Metrics.on_event`). Per-node gauges (fill, predicted/observed FPR, lag,
keys) are read at scrape time from coordinator/readings.py, so they always agree with
FleetStatus.
"""

from __future__ import annotations

import time
from typing import Any, Callable, Iterable, Sequence

from prometheus_client import CollectorRegistry, Counter, Histogram, start_http_server
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily
from prometheus_client.registry import Collector

from shardsieve.coordinator.readings import Readings
from shardsieve.coordinator.saturation import saturation_reasons
from shardsieve.sync.coordinator_side import RebuildRequested, ReplicaInstalled, SyncEvent

CANDIDATE_BUCKETS = (0, 1, 2, 3, 4, 6, 8, 16, 32, 64, 128, 256)
# Seconds: 100 microseconds to 10 s, about three buckets per decade (common practice for RPC latency).
LATENCY_BUCKETS = (0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5,
                   5.0, 10.0)


class FleetCollector(Collector):
    def __init__(self, readings: Readings, clock: Callable[[], float] = time.monotonic) -> None:
        self.readings = readings
        self.clock = clock

    def collect(self) -> Iterable[Any]:
        fleet = self.readings.fleet(self.clock())
        labels = ["node"]

        def gauge(name: str, doc: str) -> GaugeMetricFamily:
            return GaugeMetricFamily(f"shardsieve_coordinator_node_{name}", doc, labels=labels)

        fams = {
            "fill": gauge("fill_ratio", "Fraction of the replica's bits that are set"),
            "pfpr": gauge("predicted_false_positive_ratio", "Predicted false-positive rate of the replica, fill^k"),
            "ofpr": gauge("observed_false_positive_ratio",
                          "False positives over lookups checked against the node's filter (this epoch)"),
            "lag": gauge("lag_seconds", "Time since the node was last heard from (-1: never)"),
            "stale": gauge("stale", "1 when the node is stale (safe mode lists it in every candidate list)"),
            "saturated": gauge("saturated", "1 when the saturation monitor flags the node's filter"),
            "keys": gauge("keys", "Keys the node reported"),
            "cap": gauge("capacity_keys", "Keys the node's filter is sized for"),
            "epoch": gauge("epoch", "Replica epoch"),
            "implausible": gauge("implausible_fill", "1 when the replica's fill is implausible for the node's key "
                                                     "count (e.g. nearly all ones: draws a probe for every key)"),
            "rebuild": gauge("rebuild_seconds", "Time since the rebuild in flight was asked for (0: none)"),
            "wasted": CounterMetricFamily("shardsieve_coordinator_node_wasted_probes",
                                          "Probes to the node that found nothing", labels=labels),
            "probes": CounterMetricFamily("shardsieve_coordinator_node_probes", "Probes sent to the node",
                                          labels=labels),
            "bytes": CounterMetricFamily("shardsieve_coordinator_node_sync_received_bytes",
                                         "Sync bytes received from the node and applied, by kind (delta, snapshot)",
                                         labels=["node", "kind"]),
        }
        policy = fleet.policy
        for node in fleet.nodes:
            n = [node.node_id]
            c = node.counters
            reading = node.filter_reading()
            fams["fill"].add_metric(n, node.fill)
            fams["pfpr"].add_metric(n, node.predicted_fpr)
            fams["ofpr"].add_metric(n, c.observed_fpr if c else 0.0)
            fams["lag"].add_metric(n, node.lag_s if node.lag_s is not None else -1.0)
            fams["stale"].add_metric(n, 1.0 if node.stale else 0.0)
            fams["saturated"].add_metric(n, 1.0 if reading is not None and saturation_reasons(reading, policy) else 0.0)
            fams["keys"].add_metric(n, node.key_count)
            fams["cap"].add_metric(n, node.capacity)
            fams["epoch"].add_metric(n, node.epoch)
            fams["implausible"].add_metric(n, 1.0 if node.implausibility else 0.0)
            fams["rebuild"].add_metric(n, node.rebuild_age_s or 0.0)
            fams["wasted"].add_metric(n, c.wasted_probes if c else 0)
            fams["probes"].add_metric(n, c.probes if c else 0)
            fams["bytes"].add_metric([node.node_id, "delta"], node.delta_bytes)
            fams["bytes"].add_metric([node.node_id, "snapshot"], node.snapshot_bytes)
        yield from fams.values()
        g = GaugeMetricFamily("shardsieve_coordinator_rebuilds_in_progress", "Rebuilds requested and not yet verified")
        g.add_metric([], fleet.rebuilds_in_progress)
        yield g
        h = GaugeMetricFamily("shardsieve_coordinator_index_bytes", "Memory of the bit-sliced routing index")
        h.add_metric([], fleet.index_bytes)
        yield h
        held = GaugeMetricFamily("shardsieve_coordinator_hints_held", "Read-your-writes hints held")
        held.add_metric([], fleet.hints_held)
        yield held
        expired = CounterMetricFamily("shardsieve_coordinator_hints_expired",
                                      "Hints dropped by age while the replica still lacked their write "
                                      "(each one is also logged with its numbers)")
        expired.add_metric([], fleet.hints_expired)
        yield expired


class StreamCollector(Collector):
    """Sync streams open and still without a Hello, and the streams the admission caps refused or
    the Hello deadline closed (read from shardsieve/security.py `StreamAdmission` at scrape time)."""

    def __init__(self, admission: Any) -> None:
        self.admission = admission

    def collect(self) -> Iterable[Any]:
        a = self.admission
        streams = GaugeMetricFamily("shardsieve_coordinator_sync_streams",
                                    "Sync streams open, by state (pending: no Hello yet)", labels=["state"])
        streams.add_metric(["open"], a.open)
        streams.add_metric(["pending"], a.pending)
        yield streams
        refused = CounterMetricFamily("shardsieve_coordinator_sync_streams_refused",
                                      "Sync streams refused at admission, by the limit's setting", labels=["limit"])
        for limit in ("max-sync-streams", "max-pending-streams", "max-streams-per-peer"):
            refused.add_metric([limit], a.refused.get(limit, 0))
        yield refused
        late = CounterMetricFamily("shardsieve_coordinator_sync_streams_without_hello",
                                   "Sync streams closed because no Hello came within hello-timeout-ms")
        late.add_metric([], a.hello_timeouts)
        yield late


class Metrics:
    """Request-path instruments in a private registry (several coordinators per process stay apart).

    Names follow the Prometheus conventions ("Metric and label naming"): base units in the name
    (seconds, bytes, ratio), `_total` on counters (added by the client library), one name per
    idea. Lookups count reads and locates only: the probes a write sends to find where a key lives
    are probes, not lookups.
    """

    def __init__(self, readings: Readings | None = None) -> None:
        """readings: the source of the per-node gauges (None: request-path counters only)."""
        self.registry = CollectorRegistry(auto_describe=True)
        self.lookups = Counter("shardsieve_coordinator_lookups", "Keys looked up, by kind (locate, read)",
                               ["kind"], registry=self.registry)
        self.candidates = Histogram("shardsieve_coordinator_candidates_per_lookup", "Candidates listed per key",
                                    buckets=CANDIDATE_BUCKETS, registry=self.registry)
        self.probes = Counter("shardsieve_coordinator_probes", "Probes sent, by outcome (hit, wasted, unreachable)",
                              ["outcome"], registry=self.registry)
        self.probe_seconds = Histogram("shardsieve_coordinator_probe_duration_seconds",
                                       "Time of one probe to a node, by outcome", ["outcome"],
                                       buckets=LATENCY_BUCKETS, registry=self.registry)
        self.rpc_seconds = Histogram("shardsieve_coordinator_rpc_duration_seconds",
                                     "Time to answer a Router call, by method (errors included)", ["method"],
                                     buckets=LATENCY_BUCKETS, registry=self.registry)
        self.rpc_errors = Counter("shardsieve_coordinator_rpc_errors", "Router calls answered with an error, by "
                                  "method and gRPC status code", ["method", "code"], registry=self.registry)
        self.snapshots = Counter("shardsieve_coordinator_snapshots_installed", "Snapshots installed",
                                 registry=self.registry)
        self.rebuilds = Counter("shardsieve_coordinator_rebuild_requests", "Rebuild requests sent, by action "
                                "(rebuild, shrink)", ["action"], registry=self.registry)
        if readings is not None:
            self.registry.register(FleetCollector(readings))

    def observe_rpc(self, method: str, seconds: float, code: str | None) -> None:
        """One Router call answered after `seconds`, with an error code or None (OK)."""
        self.rpc_seconds.labels(method).observe(seconds)
        if code is not None:
            self.rpc_errors.labels(method, code).inc()

    def watch_streams(self, admission: Any) -> None:
        """Export the sync stream admission's counts (coordinator/sync_service.py)."""
        self.registry.register(StreamCollector(admission))

    def on_event(self, event: SyncEvent) -> None:
        """Snapshots installed and rebuild requests sent (by action: rebuild, shrink)."""
        if isinstance(event, ReplicaInstalled):
            self.snapshots.inc()
        elif isinstance(event, RebuildRequested):
            self.rebuilds.labels("shrink" if event.reason.startswith("shrink") else "rebuild").inc()

    def observe_locate(self, kind: str, counts: Sequence[int]) -> None:
        self.lookups.labels(kind).inc(len(counts))
        if len(counts) <= 64:
            for c in counts:
                self.candidates.observe(c)
        else:  # large batches: a sample keeps LocateBatch cheap
            step = len(counts) // 64
            for c in counts[::step]:
                self.candidates.observe(c)

    def observe_locate_total(self, kind: str, keys: int, candidates: int) -> None:
        """Batch path: count the keys and record the mean candidates per key once per batch."""
        self.lookups.labels(kind).inc(keys)
        if keys:
            self.candidates.observe(candidates / keys)

    def observe_probes(self, results: Sequence[Any]) -> None:
        for r in results:
            outcome = "unreachable" if not r.reached else "hit" if r.reply.found else "wasted"
            self.probes.labels(outcome).inc()
            if r.seconds is not None:
                self.probe_seconds.labels(outcome).observe(r.seconds)

    def serve(self, host: str, port: int) -> Any:
        server, _thread = start_http_server(port, addr=host, registry=self.registry)
        return server
