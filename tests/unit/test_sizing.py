"""Sizing formulas and the ladder, checked against Bloom (1970) and the standard formulas."""

from __future__ import annotations

import math

import pytest

from shardsieve.geometry import (
    MAX_BITS,
    MIN_BITS,
    SCHEME_MMH3_KM_V1,
    Geometry,
    GeometryError,
    geometry_for,
    ladder_step,
)
from shardsieve.fleet_plan import plan
from shardsieve.sizing import capacity_for, false_positive_rate, optimal_bits, optimal_hashes

# Hand arithmetic used below (constants to ten digits): ln 2 = 0.6931471806, (ln 2)^2 = 0.4804530139,
# ln 10 = 2.3025850930. A target p = 10^-d then needs m/n = d * ln 10 / (ln 2)^2 = d * 4.7925291887
# bits per key (Bloom 1970; Broder & Mitzenmacher, "Network Applications of Bloom Filters: A
# Survey", Internet Mathematics 1(4), 2004), and the best k is (m/n) ln 2 = d * log2(10) = d * 3.3219.
WORKED_EXAMPLES = [
    # (n, p, m, k). Kedmi, "Bloom Filters for the Perplexed" (2017): a filter of 1 million items at
    # error rate 0.01 needs 9,585,059 bits (~1.14 MB). Hand: 2 * 4.7925291887 * 10^6 = 9,585,058.4
    # -> 9,585,059; k = 2 * 3.3219 = 6.64 -> 7.
    (1_000_000, 0.01, 9_585_059, 7),
    # The online Bloom filter calculator of hur.st (T. Hurst): its default example, n = 4,000 at
    # p = 1e-7 -> m = 134,191 (16.38 KiB), k = 23, recalled from memory. Hand: 7 * 4.7925291887 *
    # 4,000 = 134,190.8 -> 134,191; k = 7 * 3.3219 = 23.25 -> 23.
    (4_000, 1e-7, 134_191, 23),
    # The same calculator's examples as reproduced in tutorials that quote its page: n = 10,000 at
    # p = 0.001 -> m = 143,776 (17.55 KB), k = 10; n = 40,000,000 at p = 1e-6 -> m = 1,150,207,006
    # (137.12 MB), k = 20. Hand: 3 * 4.7925291887 * 10^4 = 143,775.9 -> 143,776, k = 9.97 -> 10;
    # 6 * 4.7925291887 * 4 * 10^7 = 1,150,207,005.3 -> 1,150,207,006, k = 19.93 -> 20.
    (10_000, 0.001, 143_776, 10),
    (40_000_000, 1e-6, 1_150_207_006, 20),
    # Hand arithmetic only: 4.7925291887 * 1,000 = 4,792.53 -> 4,793; k = 3.32 -> 3.
    (1_000, 0.1, 4_793, 3),
]

# Fan, Cao, Almeida & Broder, "Summary Cache" (2000), the table also used by
# tests/unit/test_published_rates.py: for each bits-per-entry row m/n, the k whose printed rate is
# the smallest of its row (row 5 prints 0.092 for both k = 3 and k = 4, so either is right there).
SUMMARY_CACHE_BEST_K = {2: {1}, 3: {2}, 4: {3}, 5: {3, 4}, 6: {4}, 7: {5}, 8: {6}, 9: {6}, 10: {7}}

CASES = [(1_000, 0.1), (10_000, 0.01), (1_000_000, 0.01), (5_000_000, 1e-3), (123_457, 1e-4), (1, 0.5)]


@pytest.mark.parametrize(("n", "p", "m", "k"), WORKED_EXAMPLES)
def test_optimal_bits_and_hashes_match_worked_examples(n: int, p: float, m: int, k: int) -> None:
    assert optimal_bits(n, p) == m
    assert optimal_hashes(m, n) == k


def test_bits_per_key_match_the_published_rules_of_thumb() -> None:
    # "About 9.6 bits per element" give a 1% false-positive rate at the best k, and "about 4.8" more
    # bits per element cut the rate tenfold (Wikipedia, "Bloom filter", "Space and time advantages";
    # the same follows from 1.44 log2(1/p) below).
    per_key_1pct = optimal_bits(1_000_000, 0.01) / 1_000_000
    per_key_01pct = optimal_bits(1_000_000, 0.001) / 1_000_000
    assert per_key_1pct == pytest.approx(9.6, abs=0.05)
    assert per_key_01pct - per_key_1pct == pytest.approx(4.8, abs=0.05)


@pytest.mark.parametrize(("n", "p"), CASES)
def test_bits_per_key_is_1_44_log2_one_over_p(n: int, p: float) -> None:
    # Bloom (1970) analysis, as restated by Broder & Mitzenmacher (2004): at the optimum
    # m/n ~= 1.44 log2(1/p), with 1.44 as printed there (so to about three digits).
    m = optimal_bits(n, p)
    assert m / n == pytest.approx(1.44 * math.log2(1 / p), rel=3e-3, abs=1 / n)


@pytest.mark.parametrize("ratio", sorted(SUMMARY_CACHE_BEST_K))
def test_optimal_hashes_is_the_best_k_of_the_summary_cache_table(ratio: int) -> None:
    n = 1_000_000
    assert optimal_hashes(ratio * n, n) in SUMMARY_CACHE_BEST_K[ratio]


@pytest.mark.parametrize(("m", "n", "k"), [
    (10, 100, 1),   # m/n = 0.1: the best real k is below 1, and a filter needs at least one hash (common practice)
    (5, 100, 1),
])
def test_optimal_hashes_is_at_least_one(m: int, n: int, k: int) -> None:
    assert optimal_hashes(m, n) == k


def test_false_positive_rate_against_published_and_hand_worked_values() -> None:
    # Fan et al. (2000) table: m/n = 8, k = 6 -> 0.0216 (to its printed precision).
    assert abs(false_positive_rate(8_000, 6, 1_000) - 0.0216) <= 0.00005
    # Hand arithmetic for the ladder filter of 10^6 keys at 1% (m = 2^24, k = 7):
    # kn/m = 7,000,000 / 16,777,216 = 0.4172325; e^-0.4172325 = 0.6588677; 1 - that = 0.3411323;
    # 0.3411323^2 = 0.1163713, ^4 = 0.0135423, ^6 = 0.0015759, ^7 = 0.0005376.
    assert false_positive_rate(1 << 24, 7, 1_000_000) == pytest.approx(0.0005376, rel=1e-4)
    assert false_positive_rate(1024, 3, 0) == 0.0     # an empty filter reports nothing (Bloom 1970)


def test_capacity_for_inverts_the_published_rates() -> None:
    # Fan et al. (2000): m/n = 8, k = 6 gives 0.0216 and m/n = 10, k = 7 gives 0.00819, so filters
    # of 8 and 10 million bits hold about a million keys at those rates. The printed values carry
    # three digits, and the rate moves about 4 times as fast as n near there, so 0.1% is ample.
    assert capacity_for(8_000_000, 6, 0.0216) == pytest.approx(1_000_000, rel=1e-3)
    assert capacity_for(10_000_000, 7, 0.00819) == pytest.approx(1_000_000, rel=1e-3)
    # The worked example above (9,585,059 bits, k = 7) holds 10^6 keys at 1% to within the
    # rounding of k (common practice: check the inverse).
    assert capacity_for(9_585_059, 7, 0.01) == pytest.approx(1_000_000, rel=0.01)
    # and capacity_for is the largest n whose rate stays within p (its definition)
    for m, k, p in [(9_585_059, 7, 0.01), (1 << 24, 7, 0.001), (1 << 20, 3, 0.05)]:
        n = capacity_for(m, k, p)
        assert false_positive_rate(m, k, n) <= p < false_positive_rate(m, k, n + 1)


@pytest.mark.parametrize(("args", "fragment"), [
    ((0, 0.01), "keys must be at least 1"),
    ((10, 0.0), "strictly between 0 and 1"),
    ((10, 1.0), "strictly between 0 and 1"),
    ((10, float("nan")), "strictly between 0 and 1"),
    ((10, -0.5), "strictly between 0 and 1"),
])
def test_bad_sizing_input(args: tuple[int, float], fragment: str) -> None:
    with pytest.raises(ValueError, match=fragment):
        optimal_bits(*args)


def test_ladder_steps() -> None:
    assert ladder_step(1) == MIN_BITS
    assert ladder_step(MIN_BITS) == MIN_BITS
    assert ladder_step(MIN_BITS + 1) == 2 * MIN_BITS
    assert ladder_step(9_585_059) == 1 << 24
    assert ladder_step(MAX_BITS) == MAX_BITS
    with pytest.raises(GeometryError, match="2\\^40"):
        ladder_step(MAX_BITS + 1)


def test_geometry_for_rounds_m_up_and_takes_k_from_the_formula() -> None:
    g = geometry_for(1_000_000, 0.01, seed=3)
    assert g == Geometry(bits=1 << 24, hashes=7, scheme=SCHEME_MMH3_KM_V1, seed=3)
    # a whole fleet with one target shares k, whatever the ladder step
    # (docs/architecture.md#geometries-come-from-a-ladder); k = 7 at 1% by the worked examples above
    assert {geometry_for(n, 0.01).hashes for n in (1000, 30_000, 1_000_000, 7_777_777)} == {7}


def test_geometry_validation_names_field_and_bound() -> None:
    with pytest.raises(GeometryError, match="bits must be between 1024"):
        Geometry(bits=100, hashes=3).validate()
    with pytest.raises(GeometryError, match="bits must be between"):
        Geometry(bits=MAX_BITS + 1, hashes=3).validate()
    with pytest.raises(GeometryError, match="hashes must be between 1 and 32"):
        Geometry(bits=MIN_BITS, hashes=0).validate()
    with pytest.raises(GeometryError, match="hashes must be between 1 and 32"):
        Geometry(bits=MIN_BITS, hashes=33).validate()
    with pytest.raises(GeometryError, match="scheme 9 is unknown"):
        Geometry(bits=MIN_BITS, hashes=3, scheme=9).validate()
    with pytest.raises(GeometryError, match="seed must be between 0 and 4294967295"):
        Geometry(bits=MIN_BITS, hashes=3, seed=1 << 32).validate()
    with pytest.raises(GeometryError, match="bits must be an integer"):
        Geometry(bits=1024.0, hashes=3).validate()  # type: ignore[arg-type]
    Geometry(bits=MIN_BITS, hashes=3).validate()


def test_geometry_proto_round_trip_and_validation() -> None:
    from shardsieve.v1 import filter_pb2

    assert SCHEME_MMH3_KM_V1 == filter_pb2.HASH_SCHEME_MMH3_KM_V1
    g = Geometry(bits=1 << 30, hashes=11, seed=77)
    msg = g.to_proto()
    assert (msg.bits, msg.hashes, msg.scheme, msg.seed) == (1 << 30, 11, 1, 77)
    assert Geometry.from_proto(filter_pb2.Geometry.FromString(msg.SerializeToString())) == g
    assert g.byte_size == (1 << 30) // 8
    assert Geometry(bits=1025, hashes=1).byte_size == 129
    with pytest.raises(GeometryError, match="scheme 0 is unknown"):
        Geometry.from_proto(filter_pb2.Geometry(bits=1 << 20, hashes=3))


def test_plan_figures() -> None:
    # 10^6 keys at 1% on 20 nodes. Formula m = 9,585,059 and k = 7 (worked example above); ladder
    # step 2^24 = 16,777,216 (2^23 = 8,388,608 is too small), 2,097,152 bytes per node, 20 of them
    # 41,943,040 bytes. Probes per lookup (docs/loadtest.md, "The prediction"): 1 + 19 * 0.01 = 1.19
    # for a key that exists, 20 * 0.01 = 0.2 for one that does not; avoided fan-out
    # (docs/architecture.md#words) 1 - 1.19 / 20 = 0.9405. Rate of the ladder filter: 0.0005376
    # (hand-worked in test_false_positive_rate_against_published_and_hand_worked_values).
    p = plan(1_000_000, 0.01, nodes=20)
    assert p.formula_bits == 9_585_059
    assert p.bits_per_key == pytest.approx(9.585059)
    assert p.hashes == 7
    assert p.ladder_bits == 16_777_216
    assert p.filter_bytes_per_node == 2_097_152
    assert p.coordinator_bytes == 41_943_040
    assert p.expected_probes_hit == pytest.approx(1.19)
    assert p.expected_probes_miss == pytest.approx(0.2)
    assert p.avoided_fanout_hit == pytest.approx(0.9405)
    assert p.predicted_fpr_at_ladder == pytest.approx(0.0005376, rel=1e-4)
    assert set(p.to_json_dict()) >= {"bits_per_key", "hashes", "filter_bytes_per_node", "coordinator_bytes",
                                     "expected_probes_hit", "expected_probes_miss", "avoided_fanout_hit"}


@pytest.mark.parametrize(("args", "fragment"), [
    ((0, 0.01, 1), "keys must be at least 1"),
    ((10, 1.5, 1), "fpr must be strictly between 0 and 1"),
    ((10, 0.01, 0), "nodes must be at least 1"),
    ((10**13, 1e-9, 1), "above the 2\\^40-bit limit"),
])
def test_plan_rejects_bad_input(args: tuple[int, float, int], fragment: str) -> None:
    with pytest.raises(ValueError, match=fragment):
        plan(*args)
