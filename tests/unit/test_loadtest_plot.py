"""The load-test figure (docs/loadtest.md, "The plot"): it is written, and its latency series is right.

Reference for the per-second latency percentiles: numpy.percentile on the raw values of each
second, computed here independently. The PNG is checked by its signature (PNG spec, section 5.2:
the 8-byte file signature 89 50 4E 47 0D 0A 1A 0A).
"""

from __future__ import annotations

import numpy as np
import pytest

from shardsieve.loadtest.plot import draw, latency_over_time
from shardsieve.loadtest.report import Tally

pytest.importorskip("matplotlib")

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def test_latency_buckets_match_numpy_per_second() -> None:
    rng = np.random.default_rng(4)
    t = np.sort(rng.uniform(0, 3, 3000))
    lat = rng.lognormal(0.0, 0.5, 3000)
    starts, p50, p99 = latency_over_time(t, lat)
    assert starts.tolist() == [0.0, 1.0, 2.0]
    for i, s in enumerate(starts):
        sel = lat[(t >= s) & (t < s + 1)]
        assert p50[i] == pytest.approx(np.percentile(sel, 50)) and p99[i] == pytest.approx(np.percentile(sel, 99))


def _report(hot_reads: int) -> dict:
    # Node "b" has a loose filter, "a" a perfect one; 200 distinct keys live on "a" (each predicted
    # 1 + p_b = 1.3 probes), one hot key lives on "b" (predicted 1 + p_a = 1.0 probes).
    tally = Tally({"a": 0.0, "b": 0.3})
    for i in range(200):
        tally.record("a", f"kelp/lot/{i}".encode(), True, 1, 0.001, i * 0.001)
    for i in range(hot_reads):
        tally.record("b", b"kelp/lot/hot", True, 1, 0.001, 0.2 + i * 0.001)
    for i in range(200):
        tally.record(None, f"kelp/none/{i}".encode(), False, 0, 0.001, 5.2 + i * 0.001)
    return tally.build(duration_s=6.0)


def test_draw_writes_a_png(tmp_path) -> None:
    report = _report(hot_reads=0)
    out = draw(tmp_path / "lt.png", report, [0.1, 0.5, 1.2], [1.0, 2.0, 3.0])
    assert out.read_bytes()[:8] == PNG_SIGNATURE


def test_draw_survives_a_popular_key_whose_prediction_differs_from_the_distinct_keys(tmp_path) -> None:
    report = _report(hot_reads=5000)
    hit = report["interval"]["hit"]
    assert not hit["low"] <= report["predicted_probes_per_hit"] <= hit["high"]   # the situation described
    out = draw(tmp_path / "lt.png", report, [0.1, 0.5, 1.2], [1.0, 2.0, 3.0])
    assert out.read_bytes()[:8] == PNG_SIGNATURE
