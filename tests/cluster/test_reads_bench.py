"""`shardsieve bench reads` end to end on a tiny fleet: every path runs and reports, the report's
arithmetic holds (no speed is asserted: figures belong to the bench's own output)."""

from __future__ import annotations

import pytest

from shardsieve.bench.reads_bench import PATHS, measure

pytestmark = pytest.mark.cluster


def test_every_read_path_runs_and_the_ratios_are_its_own_figures() -> None:
    result = measure(nodes=3, keys=300, threads=2, seconds=0.5, rounds=1, batch=20)
    paths = result["paths"]
    assert set(paths) == set(PATHS)
    assert paths["fanout"]["probes_per_read"] == 3.0 and paths["oracle"]["probes_per_read"] == 1.0
    for name, p in paths.items():
        assert p["reads"] > 0, name
        assert p["vs_oracle"] == pytest.approx(p["reads_per_s"] / paths["oracle"]["reads_per_s"], rel=0.01)
        assert 0.0 < p["found_share"] < 1.0, name      # half the workload exists, half does not
    assert set(result["verdicts"]) >= {"local_vs_oracle", "coordinator_vs_oracle", "batch_vs_coordinator"}
