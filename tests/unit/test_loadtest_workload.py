"""Workload generation: placement, popularity (uniform / Zipf) and the lookup stream."""

from __future__ import annotations


import numpy as np
import pytest

from shardsieve.intervals import binomial_acceptance_interval
from shardsieve.loadtest.workload import LookupStream, Popularity, absent_key, place_keys, seed_key


def test_zipf_probabilities_follow_the_power_law() -> None:
    # Zipf's law, finite form: P(rank r) = r^-s / H(n, s) with H(n, s) = sum_{i<=n} i^-s
    # (Zipf 1949; generalized harmonic number by definition).
    n, s = 50, 1.2
    probs = np.sort(Popularity(n, s, np.random.default_rng(1)).probabilities())[::-1]
    harmonic = sum(i ** -s for i in range(1, n + 1))
    for r in (1, 2, 10, 50):
        assert probs[r - 1] == pytest.approx(r ** -s / harmonic, rel=1e-9)
    assert probs.sum() == pytest.approx(1.0)


def test_uniform_probabilities() -> None:
    probs = Popularity(8, 0.0).probabilities()
    assert np.allclose(probs, 1 / 8)


@pytest.mark.parametrize("s", [0.0, 0.8, 1.5])
def test_sampling_frequencies_pass_a_chi_square_test(s: float) -> None:
    # Pearson's chi-square goodness of fit (Pearson 1900): with 19 degrees of freedom the 99.9%
    # critical value is 43.82 (chi-square tables, recalled from memory).
    rng = np.random.default_rng(12345)
    pop = Popularity(20, s, rng)
    draws = 200_000
    counts = np.bincount(pop.sample(rng, draws), minlength=20)
    expected = pop.probabilities() * draws
    chi2 = float(((counts - expected) ** 2 / expected).sum())
    assert chi2 < 43.82


def test_placement_spreads_keys_over_all_nodes() -> None:
    rng = np.random.default_rng(3)
    nodes = [f"n{i}" for i in range(8)]
    owners = place_keys(rng, 8000, nodes)
    counts = {n: owners.count(n) for n in nodes}
    # Each count ~ Bin(8000, 1/8): inside its exact 99.99% region (Clopper & Pearson 1934 tails).
    lo, hi = binomial_acceptance_interval(8000, 1 / 8, 0.9999)
    assert all(lo <= c <= hi for c in counts.values()), counts
    with pytest.raises(ValueError, match="no nodes"):
        place_keys(rng, 3, [])


def test_stream_mixes_existing_and_absent_keys_at_the_asked_share() -> None:
    rng = np.random.default_rng(9)
    keys = [seed_key("r1", i) for i in range(100)]
    owners = [f"n{i % 4}" for i in range(100)]
    stream = LookupStream(rng, keys, owners, "r1", hit_share=0.3)
    lookups = stream.take(10_000)
    hits = [lk for lk in lookups if lk.owner is not None]
    misses = [lk for lk in lookups if lk.owner is None]
    lo, hi = binomial_acceptance_interval(10_000, 0.3, 0.9999)
    assert lo <= len(hits) <= hi
    owner_of = dict(zip(keys, owners))
    assert all(owner_of[lk.key] == lk.owner for lk in hits)
    absent = [lk.key for lk in misses]
    assert len(set(absent)) == len(absent), "every absent key is fresh (independent trials)"
    assert not set(absent) & set(keys)


def test_stream_rejects_bad_settings() -> None:
    rng = np.random.default_rng(0)
    with pytest.raises(ValueError, match="within 0..1"):
        LookupStream(rng, [b"a"], ["n"], "r", hit_share=1.5)
    with pytest.raises(ValueError, match="no keys"):
        LookupStream(rng, [], [], "r", hit_share=0.5)
    with pytest.raises(ValueError, match="exponent"):
        Popularity(10, -1.0)
    only_absent = LookupStream(rng, [], [], "r", hit_share=0.0).take(5)
    assert all(lk.owner is None for lk in only_absent)


def test_key_names_are_distinct_namespaces() -> None:
    assert seed_key("x", 1) != absent_key("x", 1)
    assert not absent_key("x", 1).startswith(seed_key("x", 1))
    assert seed_key("x", 10**8) == b"lt/x/k100000000"
