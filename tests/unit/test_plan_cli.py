"""`shardsieve plan`: figures from the sizing formulas, JSON field names, one-line errors."""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from shardsieve.cli.main import cli

REQUIRED_FIELDS = {"bits_per_key", "hashes", "filter_bytes_per_node", "coordinator_bytes",
                   "expected_probes_hit", "expected_probes_miss", "avoided_fanout_hit"}


def run(*args: str) -> tuple[int, str]:
    result = CliRunner().invoke(cli, ["plan", *args])
    return result.exit_code, result.output


def test_json_fields_and_values() -> None:
    code, out = run("--keys", "1000000", "--fpr", "0.01", "--nodes", "20", "--json")
    assert code == 0
    data = json.loads(out)
    assert REQUIRED_FIELDS <= set(data)
    # 10^6 keys at 1%: m = 9,585,059 bits and k = 7 (Kedmi, "Bloom Filters for the Perplexed", 2017,
    # for m; hand arithmetic in tests/unit/test_sizing.py, WORKED_EXAMPLES), so 9.585059 bits per key.
    assert data["bits_per_key"] == pytest.approx(9.585059)
    assert data["hashes"] == 7
    # the ladder step actually used: 2^24 = 16,777,216 (2^23 = 8,388,608 is below 9,585,059);
    # 2,097,152 bytes per node, 41,943,040 bytes for 20 nodes
    assert data["ladder_bits"] == 16_777_216
    assert data["filter_bytes_per_node"] == 2_097_152
    assert data["coordinator_bytes"] == 41_943_040
    # probes per lookup (docs/loadtest.md, "The prediction"): 1 + 19 * 0.01 = 1.19 for a present key,
    # 20 * 0.01 = 0.2 for an absent one; avoided fan-out (docs/architecture.md#words) 1 - 1.19/20 = 0.9405
    assert data["expected_probes_hit"] == pytest.approx(1.19)
    assert data["expected_probes_miss"] == pytest.approx(0.2)
    assert data["avoided_fanout_hit"] == pytest.approx(0.9405)


def test_table_shows_formula_and_ladder() -> None:
    code, out = run("--keys", "1000000", "--fpr", "0.01", "--nodes", "3")
    assert code == 0
    assert "9,585,059" in out            # the formula m (Kedmi 2017; see test_json_fields_and_values)
    assert "16,777,216" in out           # the ladder step used (2^24)
    assert "ladder" in out


def test_nodes_default_to_one() -> None:
    code, out = run("--keys", "500", "--fpr", "0.05", "--json")
    assert code == 0
    data = json.loads(out)
    # one node: every lookup probes it, 1 + 0 * p = 1 probe, nothing avoided (docs/loadtest.md, "The prediction")
    assert data["nodes"] == 1 and data["expected_probes_hit"] == 1.0 and data["avoided_fanout_hit"] == 0.0


@pytest.mark.parametrize(("args", "names"), [
    (["--keys", "1000", "--fpr", "0"], "--fpr"),
    (["--keys", "1000", "--fpr", "1"], "--fpr"),
    (["--keys", "1000", "--fpr", "1.5"], "--fpr"),
    (["--keys", "1000", "--fpr", "-0.1"], "--fpr"),
    (["--keys", "1000", "--fpr", "nan"], "--fpr"),
    (["--keys", "1000", "--fpr", "often"], "--fpr"),
    (["--keys", "0", "--fpr", "0.01"], "--keys"),
    (["--keys", "-5", "--fpr", "0.01"], "--keys"),
    (["--keys", "lots", "--fpr", "0.01"], "--keys"),
    (["--fpr", "0.01"], "--keys"),
    (["--keys", "1000"], "--fpr"),
    (["--keys", "1000", "--fpr", "0.01", "--nodes", "0"], "--nodes"),
    (["--keys", "10000000000000", "--fpr", "1e-9"], "2^40"),
])
def test_bad_arguments_exit_nonzero_with_one_line(args: list[str], names: str) -> None:
    code, out = run(*args)
    assert code != 0
    lines = [line for line in out.splitlines() if line.strip()]
    assert len(lines) == 1, out
    assert names in lines[0]
    assert lines[0].startswith("Error: ")
