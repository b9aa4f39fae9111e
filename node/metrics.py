"""Prometheus text metrics of a node, read from NodeCore and the sync drivers at scrape time.

A custom collector (rather than counters bumped on the write path) keeps the write path free
of metric bookkeeping and makes every scrape consistent with Stats.
"""

from __future__ import annotations

from typing import Any, Callable, Iterable, Sequence

from prometheus_client import CollectorRegistry, start_http_server
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily
from prometheus_client.registry import Collector


class NodeCollector(Collector):
    def __init__(self, core: Any, drivers: Callable[[], Sequence[Any]],
                 feed: Callable[[], dict[str, float] | None] = lambda: None) -> None:
        self.core = core
        self.drivers = drivers
        self.feed = feed      # an agent's feed figures (node/agent_daemon.py, FEED_METRICS)

    def collect(self) -> Iterable[Any]:
        core = self.core
        node = core.node_id
        yield from self._feed_metrics(node)
        if not core.ready:
            g = GaugeMetricFamily("shardsieve_node_ready", "1 once the filter is loaded from the store", labels=["node"])
            g.add_metric([node], 0.0)
            yield g
            return
        s = core.stats()

        def gauge(name: str, doc: str, value: float) -> GaugeMetricFamily:
            g = GaugeMetricFamily(name, doc, labels=["node"])
            g.add_metric([node], float(value))
            return g

        def counter(name: str, doc: str, value: float) -> CounterMetricFamily:
            c = CounterMetricFamily(name, doc, labels=["node"])
            c.add_metric([node], float(value))
            return c

        yield gauge("shardsieve_node_ready", "1 once the filter is loaded from the store", 1)
        yield gauge("shardsieve_node_keys", "Keys in the store (and the filter)", s["key_count"])
        yield gauge("shardsieve_node_capacity_keys", "Keys the filter is sized for", s["capacity"])
        yield gauge("shardsieve_node_filter_bits", "Filter size m in bits", s["geometry"].bits)
        yield gauge("shardsieve_node_filter_hashes", "Filter hash count k", s["geometry"].hashes)
        yield gauge("shardsieve_node_fill_ratio", "Fraction of filter bits set", s["fill"])
        yield gauge("shardsieve_node_predicted_false_positive_ratio", "Predicted false-positive rate fill^k", s["predicted_fpr"])
        yield gauge("shardsieve_node_epoch", "Filter epoch", s["epoch"])
        yield gauge("shardsieve_node_sequence", "Last cut delta sequence of the epoch", s["sequence"])
        yield gauge("shardsieve_node_saturated_counters", "Counters pinned at 15", s["saturated_counters"])
        yield counter("shardsieve_node_reads", "Keys read", s["reads"])
        yield counter("shardsieve_node_reads_not_found", "Reads that found nothing (a wasted probe when a coordinator sent it)", s["reads_missed"])
        yield counter("shardsieve_node_writes", "Keys written (puts)", s["writes"])
        yield counter("shardsieve_node_deletes", "Keys deleted (requests)", s["deletes"])
        yield counter("shardsieve_node_sync_sent_bytes", "Delta and snapshot bytes sent to coordinators",
                      s["bytes_pushed"])
        rebuilds = CounterMetricFamily("shardsieve_node_rebuilds", "Filter rebuilds by outcome",
                                       labels=["node", "outcome"])
        rebuilds.add_metric([node, "completed"], float(s["rebuilds_completed"]))
        rebuilds.add_metric([node, "abandoned"], float(s["rebuilds_abandoned"]))
        yield rebuilds
        yield gauge("shardsieve_node_rebuild_progress_ratio", "Rebuild progress 0..1 (0 when idle)", s["rebuild_progress"])
        lag = GaugeMetricFamily("shardsieve_node_coordinator_lag_sequences", "Sequences cut but not acknowledged",
                                labels=["node", "coordinator"])
        connected = GaugeMetricFamily("shardsieve_node_coordinator_connected", "1 while the stream is open",
                                      labels=["node", "coordinator"])
        acks = CounterMetricFamily("shardsieve_node_coordinator_acks", "Acks received", labels=["node", "coordinator"])
        reconnects = CounterMetricFamily("shardsieve_node_coordinator_connects", "Stream (re)connects",
                                         labels=["node", "coordinator"])
        for driver in self.drivers():
            d = driver.status()
            lag.add_metric([node, driver.address], float(d["lag"]))
            connected.add_metric([node, driver.address], 1.0 if d["connected"] else 0.0)
            acks.add_metric([node, driver.address], float(d["acks"]))
            reconnects.add_metric([node, driver.address], float(d["connects"]))
        yield lag
        yield connected
        yield acks
        yield reconnects

    def _feed_metrics(self, node: str) -> Iterable[Any]:
        """An agent's feed (also while it lists the store before its filter exists)."""
        figures = self.feed()
        if not figures:
            return
        for name, (kind, doc) in FEED_METRICS.items():
            family = GaugeMetricFamily if kind == "gauge" else CounterMetricFamily
            metric = family(f"shardsieve_agent_{name}", doc, labels=["node"])
            metric.add_metric([node], float(figures.get(name, 0.0)))
            yield metric


#: An agent's feed figures: name -> (kind, help). The daemon's `_feed_figures` fills them.
FEED_METRICS: dict[str, tuple[str, str]] = {
    "feed_live": ("gauge", "1 while the store's change feed is live (0: listing, sweeping or broken: the "
                           "agent holds its sync streams, so coordinators list it as stale)"),
    "listings": ("counter", "Listings of the store (the first one and one after every feed break)"),
    "feed_breaks": ("counter", "Feed breaks (subscription lost, server restarted, slot lost, key count differed)"),
    "keys_counted": ("counter", "Keys the ledger took in (each counted once)"),
    "keys_uncounted": ("counter", "Keys the ledger gave up (each uncounted once)"),
    "keys_swept": ("counter", "Ledger keys a sweep found gone from the store"),
    "rebuilds_after_break": ("counter", "Rebuilds under a new epoch requested after a feed break"),
}


def start_metrics(core: Any, host: str, port: int, drivers: Callable[[], Sequence[Any]],
                  feed: Callable[[], dict[str, float] | None] = lambda: None) -> Any:
    """Serve /metrics on host:port from a private registry; returns the server (has .shutdown())."""
    registry = CollectorRegistry(auto_describe=False)
    registry.register(NodeCollector(core, drivers, feed))
    server, _thread = start_http_server(port, addr=host, registry=registry)
    return server
