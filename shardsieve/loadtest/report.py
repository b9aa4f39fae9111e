"""Probe accounting for a load test and the report: measured vs predicted fan-out.

Pure: the runner feeds one `record(...)` per lookup; `build()` returns a plain dict (the --json
output). Prediction from each node's predicted false-positive rate p_j = fill_j^k_j
(Bloom 1970; Broder & Mitzenmacher 2004), with every candidate probed:
  existing key held by node i:  1 + sum_{j != i} p_j     (= 1 + (N-1) p when all p_j = p)
  absent key:                   sum_j p_j                (= N p)
avoided fan-out = 1 - probes / (lookups x N). The formulas live in shardsieve/fanout.py.
"""

from __future__ import annotations

import math
from array import array
from typing import Any, Mapping

from hdrh.histogram import HdrHistogram

from shardsieve.fanout import avoided_fanout, expected_probes_hit, expected_probes_miss
from shardsieve.intervals import binomial_acceptance_interval, wilson_interval

INTERVAL_METHOD = ("exact binomial acceptance region around the prediction (equal tails, as inverted by "
                   "Clopper & Pearson 1934); binomial bound is conservative for unequal node rates "
                   "(Hoeffding 1956)")

# Latency histogram range: 1 microsecond .. 10 minutes, 3 significant digits (HdrHistogram).
_LAT_LOW_US = 1
_LAT_HIGH_US = 600_000_000
_LAT_DIGITS = 3


class Tally:
    """Running totals for one load test. Not thread-safe: the runner serialises `record`."""

    def __init__(self, fprs: Mapping[str, float], confidence: float = 0.999, keep_series: bool = True) -> None:
        if not fprs:
            raise ValueError("the fleet has no nodes: nothing to measure")
        self.fprs = dict(fprs)
        self.nodes = len(self.fprs)
        self.confidence = confidence
        self.lookups = 0
        self.hits = 0
        self.misses = 0
        self.errors = 0
        self.hit_probes = 0
        self.miss_probes = 0
        self.hit_predicted = 0.0
        self.false_negatives = 0
        self.phantom_hits = 0
        self.false_negative_keys: list[bytes] = []
        self._miss_pred = expected_probes_miss(self.fprs)
        self._hit_pred_by_owner = {node: expected_probes_hit(self.fprs, node) for node in self.fprs}
        # First observation per distinct existing key: repeated reads of a popular key repeat the
        # same filter answers, so only distinct keys count as independent trials for the interval.
        self._seen: set[bytes] = set()
        self.distinct_hits = 0
        self.distinct_hit_wasted = 0
        self.distinct_hit_pred_wasted = 0.0
        self.histogram = HdrHistogram(_LAT_LOW_US, _LAT_HIGH_US, _LAT_DIGITS)
        self.series_t: array = array("d")
        self.series_latency_ms: array = array("d")
        self.series_probes: array = array("H")
        self.keep_series = keep_series

    def record(self, owner: str | None, key: bytes, found: bool, probes: int, latency_s: float,
               at_s: float) -> None:
        """One completed lookup: who holds it (None: nobody), was it found, how many probes."""
        self.lookups += 1
        self.histogram.record_value(max(_LAT_LOW_US, min(_LAT_HIGH_US, int(round(latency_s * 1e6)))))
        if self.keep_series:
            self.series_t.append(at_s)
            self.series_latency_ms.append(latency_s * 1e3)
            self.series_probes.append(min(probes, 65535))
        if owner is None:
            self.misses += 1
            self.miss_probes += probes
            if found:
                self.phantom_hits += 1
            return
        self.hits += 1
        self.hit_probes += probes
        pred = self._hit_pred_by_owner.get(owner)
        if pred is None:  # owner not in the fleet view (should not happen): all others count
            pred = 1.0 + expected_probes_miss(self.fprs)
        self.hit_predicted += pred
        if not found:
            self.false_negatives += 1
            if len(self.false_negative_keys) < 20:
                self.false_negative_keys.append(key)
        if key not in self._seen:
            self._seen.add(key)
            self.distinct_hits += 1
            self.distinct_hit_wasted += max(0, probes - 1)
            self.distinct_hit_pred_wasted += pred - 1.0

    def record_error(self) -> None:
        """A lookup the coordinator could not answer (e.g. a candidate unreachable)."""
        self.errors += 1

    # -- report ---------------------------------------------------------------------------------
    def latency_ms(self) -> dict[str, float]:
        h = self.histogram
        if self.lookups == 0:
            return {"p50": 0.0, "p90": 0.0, "p99": 0.0, "max": 0.0, "mean": 0.0}
        return {
            "p50": h.get_value_at_percentile(50) / 1e3,
            "p90": h.get_value_at_percentile(90) / 1e3,
            "p99": h.get_value_at_percentile(99) / 1e3,
            "max": h.get_max_value() / 1e3,
            "mean": h.get_mean_value() / 1e3,
        }

    def interval_hit(self) -> dict[str, Any]:
        """Check on distinct existing keys: wasted probes ~ Bin(distinct x (N-1), mean p)."""
        d = self.distinct_hits
        trials = d * (self.nodes - 1)
        if d == 0:
            return {"keys": 0, "trials": 0, "measured": None, "low": None, "high": None, "inside": None}
        p = min(1.0, max(0.0, self.distinct_hit_pred_wasted / trials)) if trials else 0.0
        lo, hi = binomial_acceptance_interval(trials, p, self.confidence)
        measured = 1.0 + self.distinct_hit_wasted / d
        w_lo, w_hi = wilson_interval(self.distinct_hit_wasted, trials, self.confidence) if trials else (0.0, 0.0)
        return {
            "keys": d, "trials": trials, "wasted": self.distinct_hit_wasted,
            "predicted": 1.0 + self.distinct_hit_pred_wasted / d,
            "measured": measured, "low": 1.0 + lo / d, "high": 1.0 + hi / d,
            "inside": lo <= self.distinct_hit_wasted <= hi,
            "measured_rate_wilson": [w_lo, w_hi],
        }

    def interval_miss(self) -> dict[str, Any]:
        """Absent keys are all distinct: wasted probes ~ Bin(misses x N, mean p)."""
        m = self.misses
        if m == 0:
            return {"keys": 0, "trials": 0, "measured": None, "low": None, "high": None, "inside": None}
        trials = m * self.nodes
        p = min(1.0, max(0.0, self._miss_pred / self.nodes))
        lo, hi = binomial_acceptance_interval(trials, p, self.confidence)
        w_lo, w_hi = wilson_interval(min(self.miss_probes, trials), trials, self.confidence)
        return {
            "keys": m, "trials": trials, "wasted": self.miss_probes,
            "predicted": self._miss_pred,
            "measured": self.miss_probes / m, "low": lo / m, "high": hi / m,
            "inside": lo <= self.miss_probes <= hi,
            "measured_rate_wilson": [w_lo, w_hi],
        }

    def build(self, duration_s: float, wasted_per_node: Mapping[str, int] | None = None) -> dict[str, Any]:
        """The report as plain data (the --json document)."""
        probes_hit = self.hit_probes / self.hits if self.hits else None
        probes_miss = self.miss_probes / self.misses if self.misses else None
        pred_hit = (self.hit_predicted / self.hits if self.hits
                    else (sum(self._hit_pred_by_owner.values()) / self.nodes))
        pred_miss = self._miss_pred
        total_probes = self.hit_probes + self.miss_probes
        pred_total = self.hit_predicted + self.misses * pred_miss

        def ratio(measured: float | None, predicted: float) -> float | None:
            if measured is None:
                return None
            if predicted == 0:
                return 1.0 if measured == 0 else math.inf
            return measured / predicted

        return {
            "lookups": self.lookups,
            "hits": self.hits,
            "misses": self.misses,
            "errors": self.errors,
            "nodes": self.nodes,
            "duration_s": duration_s,
            "throughput_per_s": self.lookups / duration_s if duration_s > 0 else 0.0,
            "latency_ms": self.latency_ms(),
            "probes_per_hit": probes_hit,
            "probes_per_miss": probes_miss,
            "probes_per_lookup": total_probes / self.lookups if self.lookups else None,
            "predicted_probes_per_hit": pred_hit,
            "predicted_probes_per_miss": pred_miss,
            "ratio_hit": ratio(probes_hit, pred_hit),
            "ratio_miss": ratio(probes_miss, pred_miss),
            "avoided_fanout": avoided_fanout(probes=total_probes, lookups=self.lookups, nodes=self.nodes),
            "predicted_avoided_fanout": avoided_fanout(probes=pred_total, lookups=self.lookups, nodes=self.nodes),
            "false_negatives": self.false_negatives,
            "false_negative_keys": [k.decode("utf-8", "backslashreplace") for k in self.false_negative_keys],
            "phantom_hits": self.phantom_hits,
            "predicted_fpr_per_node": dict(sorted(self.fprs.items())),
            "wasted_probes_per_node": dict(sorted((wasted_per_node or {}).items())),
            "interval": {
                "confidence": self.confidence,
                "method": INTERVAL_METHOD,
                "hit": self.interval_hit(),
                "miss": self.interval_miss(),
            },
        }
