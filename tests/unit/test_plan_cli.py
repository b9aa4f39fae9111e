"""`shardsieve plan`: figures from the sizing formulas, JSON field names, one-line errors."""

from __future__ import annotations

import json
import math

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
    # m/n = -ln p / (ln 2)^2 and k = round((m/n) ln 2) (Bloom 1970)
    m = math.ceil(-1_000_000 * math.log(0.01) / math.log(2) ** 2)
    assert data["bits_per_key"] == pytest.approx(m / 1_000_000)
    assert data["hashes"] == round(m / 1_000_000 * math.log(2))
    # the ladder step actually used: next power of two above the formula m
    assert data["ladder_bits"] == 1 << math.ceil(math.log2(m))
    assert data["filter_bytes_per_node"] == data["ladder_bits"] // 8
    assert data["coordinator_bytes"] == 20 * data["filter_bytes_per_node"]
    # probes per lookup: 1 + (K-1)p for a present key, K p for an absent one (issue 2, point 2)
    assert data["expected_probes_hit"] == pytest.approx(1 + 19 * 0.01)
    assert data["expected_probes_miss"] == pytest.approx(20 * 0.01)
    assert data["avoided_fanout_hit"] == pytest.approx(1 - (1 + 19 * 0.01) / 20)


def test_table_shows_formula_and_ladder() -> None:
    code, out = run("--keys", "1000000", "--fpr", "0.01", "--nodes", "3")
    assert code == 0
    assert "9,585,059" in out            # the formula m
    assert "16,777,216" in out           # the ladder step used (2^24)
    assert "ladder" in out


def test_nodes_default_to_one() -> None:
    code, out = run("--keys", "500", "--fpr", "0.05", "--json")
    assert code == 0
    data = json.loads(out)
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
