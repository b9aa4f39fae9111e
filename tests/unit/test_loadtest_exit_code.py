"""`shardsieve loadtest` exits non-zero, with one line, when a seeded key was reported absent.

The run itself is replaced by a report built by the real Tally from recorded lookups (so the
command's own wiring — print the report, then judge it — is what is tested). Requirement
source: docs/loadtest.md ("What it does": the run exits 8 if any seeded key was reported absent)
and docs/architecture.md#1-no-false-negatives-once-synced; exit code 8 is the one documented in
README.md "Operating from the terminal".
"""

from __future__ import annotations

import json
from types import SimpleNamespace

import pytest
from click.testing import CliRunner

import shardsieve.cli.loadtest as loadtest_cli
from shardsieve.cli.main import cli
from shardsieve.loadtest.report import Tally


def _report(false_negatives: int) -> dict:
    tally = Tally({"shed-1": 0.01, "shed-2": 0.01})
    for i in range(20):
        # a held key: found unless it is one of the first `false_negatives` lookups
        tally.record("shed-1", f"kelp/lot/{i}".encode(), i >= false_negatives, 1, 0.001, i * 0.01)
    return tally.build(duration_s=1.0)


@pytest.mark.parametrize("false_negatives, exit_code", [(0, 0), (3, 8)])
def test_exit_code_follows_false_negatives(monkeypatch, false_negatives: int, exit_code: int) -> None:
    report = _report(false_negatives)
    assert report["false_negatives"] == false_negatives       # the Tally counted what was recorded
    monkeypatch.setattr(loadtest_cli, "execute", lambda *a, **k: SimpleNamespace(report=report))
    res = CliRunner().invoke(cli, ["loadtest", "--coordinator", "127.0.0.1:1", "--count", "20", "--json"],
                             env={"SHARDSIEVE_CONFIG": ""}, catch_exceptions=False)
    assert res.exit_code == exit_code, res.output
    assert json.loads(res.stdout)["false_negatives"] == false_negatives   # the report is printed either way
    err = [line for line in res.stderr.splitlines() if line.strip()]
    if exit_code:
        assert len(err) == 1 and err[0].startswith("Error: 3 seeded keys were reported absent")
        assert "kelp/lot/0" in err[0]
    else:
        assert err == []
