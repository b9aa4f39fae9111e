"""`shardsieve bench filter` runs end to end and reports every field docs/wire-formats.md
("How the delta size is measured") and README.md "Benchmarks" name.

Speed is not asserted here (benchmarks print ratios; tests do not time things): the test
checks the benchmark measures what it says, on a small key count.
"""

from __future__ import annotations

import functools
import json

import pytest
from click.testing import CliRunner

from shardsieve.cli.main import cli

FIELDS = {"insert_ratio_vs_rbloom", "query_ratio_vs_rbloom", "query_fraction_of_hash_floor",
          "delta_size_vs_entropy", "delta_size_vs_zstd", "codec_positions_per_s"}


def test_bench_filter_json_has_every_field(monkeypatch: pytest.MonkeyPatch) -> None:
    from shardsieve.bench import codec_figures

    # a small codec run keeps the test short; the real function still measures
    monkeypatch.setattr(codec_figures, "measure_codec", functools.partial(codec_figures.measure_codec, bits=1 << 16))
    result = CliRunner().invoke(cli, ["bench", "filter", "--keys", "5000", "--rounds", "1", "--json"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout.strip().splitlines()[-1])
    assert FIELDS <= set(data)
    assert data["keys"] == 5000
    for name in ("ours_insert_per_s", "ours_query_per_s", "rbloom_insert_per_s", "rbloom_query_per_s",
                 "hash_floor_per_s"):
        assert data[name] > 0
    # ratios are the quotients of the raw rates measured in the same run
    assert data["insert_ratio_vs_rbloom"] == pytest.approx(data["ours_insert_per_s"] / data["rbloom_insert_per_s"])
    assert data["query_ratio_vs_rbloom"] == pytest.approx(data["ours_query_per_s"] / data["rbloom_query_per_s"])
    assert data["query_fraction_of_hash_floor"] == pytest.approx(data["ours_query_per_s"] / data["hash_floor_per_s"])
    # codec sizes against the entropy bound can never be below 1 (counting argument)
    assert data["delta_size_vs_entropy"] >= 1.0
    assert len(data["codec_rows"]) == 3


def test_bench_filter_table_without_codec() -> None:
    result = CliRunner().invoke(cli, ["bench", "filter", "--keys", "3000", "--rounds", "1", "--skip-codec"])
    assert result.exit_code == 0, result.output
    assert "insert_ratio_vs_rbloom" in result.output and "query_ratio_vs_rbloom" in result.output
    assert "delta_size_vs_entropy" not in result.output
