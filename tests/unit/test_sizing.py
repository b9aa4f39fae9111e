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

CASES = [(1_000, 0.1), (10_000, 0.01), (1_000_000, 0.01), (5_000_000, 1e-3), (123_457, 1e-4), (1, 0.5)]


@pytest.mark.parametrize(("n", "p"), CASES)
def test_optimal_bits_is_the_least_m_reaching_p(n: int, p: float) -> None:
    # m = ceil(-n ln p / (ln 2)^2) (Bloom 1970; Broder & Mitzenmacher 2004, eq. for optimal m)
    m = optimal_bits(n, p)
    assert m == math.ceil(-n * math.log(p) / math.log(2) ** 2)
    # at the optimal k (real-valued) the rate of m bits is at most p, and of m - 1 bits above p
    # (Bloom 1970: at the optimum p = (1/2)^k = 0.6185^(m/n))
    assert 0.5 ** (m / n * math.log(2)) <= p * (1 + 1e-12)
    if m > 1:
        assert 0.5 ** ((m - 1) / n * math.log(2)) > p * (1 - 1e-12)


@pytest.mark.parametrize(("n", "p"), CASES)
def test_bits_per_key_is_1_44_log2_one_over_p(n: int, p: float) -> None:
    # Bloom (1970) analysis, as restated by Broder & Mitzenmacher (2004): at the optimum
    # m/n = log2(e) * log2(1/p) ~= 1.44 log2(1/p).
    m = optimal_bits(n, p)
    assert m / n == pytest.approx(math.log2(math.e) * math.log2(1 / p), abs=1 / n)
    assert m / n == pytest.approx(1.44 * math.log2(1 / p), rel=3e-3, abs=1 / n)  # 1.44 as printed


@pytest.mark.parametrize(("m", "n"), [(9_585_059, 1_000_000), (10, 1), (1000, 100), (4793, 1000), (5, 100)])
def test_optimal_hashes_is_m_over_n_ln2(m: int, n: int) -> None:
    # Bloom (1970): best k = (m/n) ln 2, rounded to a whole number, at least 1.
    k = optimal_hashes(m, n)
    assert k == max(1, math.floor(m / n * math.log(2) + 0.5))
    # the rounded k is never worse than its neighbours (checks the rounding direction)
    if k > 1:
        assert false_positive_rate(m, k, n) <= false_positive_rate(m, k - 1, n)
    assert false_positive_rate(m, k, n) <= false_positive_rate(m, k + 1, n)


def test_false_positive_rate_formula_and_inverse() -> None:
    # p = (1 - e^(-kn/m))^k (Bloom 1970; Fan et al. 2000, section V.C)
    assert false_positive_rate(8_000, 6, 1_000) == pytest.approx((1 - math.exp(-6 / 8)) ** 6, rel=1e-12)
    assert false_positive_rate(1024, 3, 0) == 0.0
    for m, k, p in [(9_585_059, 7, 0.01), (1 << 24, 7, 0.001), (1 << 20, 3, 0.05)]:
        n = capacity_for(m, k, p)
        assert false_positive_rate(m, k, n) <= p < false_positive_rate(m, k, n + 1)


def test_capacity_of_optimal_size_is_about_n() -> None:
    n, p = 1_000_000, 0.01
    m = optimal_bits(n, p)
    k = optimal_hashes(m, n)
    # the formula size holds n keys to within the rounding of k (common practice: check the inverse)
    assert abs(capacity_for(m, k, p) - n) / n < 0.01


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
    # a whole fleet with one target shares k, whatever the ladder step (ARCHITECTURE.md)
    assert {geometry_for(n, 0.01).hashes for n in (1000, 30_000, 1_000_000, 7_777_777)} == {7}
    # the ladder filter is at least as good as the formula promises
    assert false_positive_rate(g.bits, g.hashes, 1_000_000) <= 0.01


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
    # probes: 1 + (K-1)p for a present key, K p for an absent one; avoided fan-out
    # 1 - probes/K (definitions in the issue and ARCHITECTURE.md "Words").
    p = plan(1_000_000, 0.01, nodes=20)
    assert p.formula_bits == optimal_bits(1_000_000, 0.01)
    assert p.bits_per_key == pytest.approx(p.formula_bits / 1_000_000)
    assert p.hashes == 7
    assert p.ladder_bits == 1 << 24
    assert p.filter_bytes_per_node == (1 << 24) // 8
    assert p.coordinator_bytes == 20 * p.filter_bytes_per_node
    assert p.expected_probes_hit == pytest.approx(1 + 19 * 0.01)
    assert p.expected_probes_miss == pytest.approx(20 * 0.01)
    assert p.avoided_fanout_hit == pytest.approx(1 - 1.19 / 20)
    assert p.predicted_fpr_at_ladder == pytest.approx(false_positive_rate(1 << 24, 7, 1_000_000))
    assert p.predicted_fpr_at_ladder < 0.01
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
