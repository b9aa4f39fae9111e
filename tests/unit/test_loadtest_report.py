"""Probe accounting and the load-test report, checked against independent Bloom filters."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest

from shardsieve.fanout import avoided_fanout
from shardsieve.fanout import expected_probes_hit as predicted_probes_hit
from shardsieve.fanout import expected_probes_miss as predicted_probes_miss
from shardsieve.loadtest.report import Tally

REPORT_FIELDS = {"lookups", "throughput_per_s", "latency_ms", "probes_per_hit", "probes_per_miss",
                 "predicted_probes_per_hit", "predicted_probes_per_miss", "avoided_fanout", "false_negatives"}


class ReferenceBloom:
    """A textbook Bloom filter (Bloom 1970) built on hashlib, independent of the project's hashing:
    k positions from SHA-256 of (i, key), m bits in a numpy bool array."""

    def __init__(self, m: int, k: int) -> None:
        self.m, self.k = m, k
        self.bits = np.zeros(m, dtype=bool)

    def _positions(self, key: bytes) -> list[int]:
        return [int.from_bytes(hashlib.sha256(bytes([i]) + key).digest()[:8], "little") % self.m
                for i in range(self.k)]

    def add(self, key: bytes) -> None:
        self.bits[self._positions(key)] = True

    def may_hold(self, key: bytes) -> bool:
        return bool(self.bits[self._positions(key)].all())

    def predicted_fpr(self) -> float:
        return float(self.bits.mean()) ** self.k   # fill^k


def test_predictions_reduce_to_the_textbook_forms_when_rates_are_equal() -> None:
    # With p_j = p for all N nodes: 1 + (N-1) p for a held key, N p for an absent one
    # (Broder & Mitzenmacher 2004, sec. 2: each non-holder answers "maybe" with probability p).
    fprs = {f"n{i}": 0.02 for i in range(8)}
    assert predicted_probes_hit(fprs, "n3") == pytest.approx(1 + 7 * 0.02)
    assert predicted_probes_miss(fprs) == pytest.approx(8 * 0.02)
    uneven = {"a": 0.1, "b": 0.2, "c": 0.3}
    assert predicted_probes_hit(uneven, "b") == pytest.approx(1.4)
    assert predicted_probes_miss(uneven) == pytest.approx(0.6)


def test_avoided_fanout_definition() -> None:
    # docs/architecture.md#words: avoided fan-out = 1 - probes / (lookups x nodes).
    assert avoided_fanout(probes=110, lookups=100, nodes=8) == pytest.approx(1 - 110 / 800)
    assert avoided_fanout(probes=0, lookups=0, nodes=8) == 0.0
    with pytest.raises(TypeError):   # keyword-only: a swapped (probes, lookups) cannot slip through
        avoided_fanout(110, 100, 8)  # type: ignore[misc]


def simulate(rng: np.random.Generator, nodes: int = 6, keys_per_node: int = 400, lookups: int = 6000,
             drop_owner: bool = False, claim_factor: float = 1.0) -> Tally:
    """A fleet of reference Bloom filters; a lookup probes every filter that may hold the key."""
    filters = {}
    keys: list[bytes] = []
    owners: list[str] = []
    for j in range(nodes):
        nid = f"n{j}"
        f = ReferenceBloom(m=4096, k=4)
        for i in range(keys_per_node):
            key = f"{nid}/key/{i}".encode()
            f.add(key)
            keys.append(key)
            owners.append(nid)
        filters[nid] = f
    tally = Tally({nid: f.predicted_fpr() * claim_factor for nid, f in filters.items()})
    absent = 0
    for t in range(lookups):
        if rng.random() < 0.5:
            i = int(rng.integers(len(keys)))
            key, owner = keys[i], owners[i]
        else:
            key, owner = f"absent/{absent}".encode(), None
            absent += 1
        candidates = [nid for nid, f in filters.items() if f.may_hold(key)]
        found = owner in candidates and not (drop_owner and owner == "n0")
        tally.record(owner, key, found, len(candidates), latency_s=0.001 + 0.0001 * (t % 10), at_s=t * 0.001)
    return tally


def test_measured_probes_fall_inside_the_binomial_interval_of_real_bloom_filters() -> None:
    # Reference: independent textbook Bloom filters; prediction p_j = fill_j^k (Bloom 1970), checked
    # with the exact binomial 99.9% acceptance region (Clopper & Pearson 1934 tails).
    tally = simulate(np.random.default_rng(2024))
    report = tally.build(duration_s=6.0)
    assert REPORT_FIELDS <= set(report)
    assert set(report["latency_ms"]) >= {"p50", "p90", "p99", "max"}
    assert report["false_negatives"] == 0
    assert report["interval"]["miss"]["inside"] is True, report["interval"]["miss"]
    assert report["interval"]["hit"]["inside"] is True, report["interval"]["hit"]
    # The filters are loaded so that p is well above zero: the check is not trivially passing.
    assert 0.01 < report["predicted_probes_per_miss"] < 1.0
    assert report["lookups"] == 6000
    assert report["throughput_per_s"] == pytest.approx(1000.0)


def test_a_model_that_is_wrong_falls_outside_the_interval() -> None:
    # Same kind of fleet, but the prediction claims every filter is 3x better than it is: the
    # interval check must notice (the test of the test).
    report = simulate(np.random.default_rng(11), claim_factor=1 / 3).build(duration_s=1.0)
    assert report["interval"]["miss"]["inside"] is False
    assert report["interval"]["hit"]["inside"] is False
    assert report["ratio_miss"] > 2.0


def test_false_negatives_are_counted_and_named() -> None:
    tally = simulate(np.random.default_rng(5), drop_owner=True)
    report = tally.build(duration_s=1.0)
    assert report["false_negatives"] > 0
    assert all(k.startswith("n0/") for k in report["false_negative_keys"])


def test_latency_percentiles_match_numpy_within_hdr_precision() -> None:
    # HdrHistogram with 3 significant digits keeps values within 0.1% (Tene, HdrHistogram docs);
    # numpy.percentile on the raw values is the reference (nearest-rank style, "higher").
    rng = np.random.default_rng(3)
    lat = rng.lognormal(mean=-6, sigma=0.8, size=20_000)   # seconds, ~2.5 ms median
    tally = Tally({"a": 0.01})
    for i, x in enumerate(lat):
        tally.record(None, f"x{i}".encode(), False, 0, float(x), float(i))
    got = tally.latency_ms()
    for q, name in ((50, "p50"), (90, "p90"), (99, "p99")):
        ref = float(np.percentile(lat * 1e3, q, method="higher"))
        assert got[name] == pytest.approx(ref, rel=2e-3)
    assert got["max"] == pytest.approx(float(lat.max() * 1e3), rel=2e-3)


def test_repeated_reads_of_a_popular_key_count_once_for_the_interval() -> None:
    tally = Tally({"a": 0.1, "b": 0.1})
    for _ in range(50):
        tally.record("a", b"hot", True, 2, 0.001, 0.0)
    iv = tally.interval_hit()
    assert iv["keys"] == 1 and iv["trials"] == 1
    assert tally.build(1.0)["probes_per_hit"] == pytest.approx(2.0)


def test_empty_fleet_is_refused() -> None:
    with pytest.raises(ValueError, match="no nodes"):
        Tally({})
