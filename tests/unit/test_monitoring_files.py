"""The alerting rules and the dashboard in compose/monitoring/ are read by the tools that use them.

- Rules: `promtool check rules` parses them and `promtool test rules` runs their unit tests
  (compose/monitoring/shardsieve-alerts.test.yml: input series, expected alerts, labels and
  annotations) — Prometheus docs, "Unit testing for rules". promtool comes from Debian's
  prometheus package, which `.ci/run` installs when it is missing.
- Dashboard: Grafana's own SDK for dashboards as code (grafana-foundation-sdk, from PyPI) reads
  it, and every PromQL expression in it is parsed by promtool.
Which metric names the daemons really export is checked against a live scrape in
tests/cluster/test_metrics_exported.py.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest

MONITORING = Path(__file__).resolve().parents[2] / "compose" / "monitoring"
RULES = MONITORING / "shardsieve-alerts.yml"
RULE_TESTS = MONITORING / "shardsieve-alerts.test.yml"
DASHBOARD = MONITORING / "shardsieve-dashboard.json"


def promtool() -> str:
    tool = shutil.which("promtool")
    if tool is None:
        if os.environ.get("CI"):
            pytest.fail("promtool is missing: .ci/run installs Debian's prometheus package")
        pytest.skip("promtool is not installed (Debian package prometheus)")
    return tool


def run(*args: str, cwd: Path = MONITORING) -> subprocess.CompletedProcess[str]:
    return subprocess.run(list(args), cwd=cwd, capture_output=True, text=True, timeout=120)


def test_rules_parse() -> None:
    proc = run(promtool(), "check", "rules", RULES.name)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "SUCCESS: 6 rules found" in proc.stdout


def test_rules_fire_as_their_unit_tests_expect() -> None:
    proc = run(promtool(), "test", "rules", RULE_TESTS.name)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "SUCCESS" in proc.stdout


def test_every_alert_has_a_unit_test() -> None:
    alerts = set(re.findall(r"^\s*- alert: (\S+)", RULES.read_text(), re.M))
    tested = set(re.findall(r"alertname: (\S+)", RULE_TESTS.read_text()))
    assert alerts == tested, alerts ^ tested


def dashboard() -> dict[str, Any]:
    return json.loads(DASHBOARD.read_text())


def test_dashboard_is_read_by_grafanas_sdk() -> None:
    from grafana_foundation_sdk.cog.encoder import JSONEncoder
    from grafana_foundation_sdk.models.dashboard import Dashboard

    original = dashboard()
    model = Dashboard.from_json(original)
    again = json.loads(json.dumps(model, cls=JSONEncoder))
    assert again["uid"] == original["uid"] and again["title"] == original["title"]
    assert [(p["id"], p["type"], p["title"]) for p in again["panels"]] == [
        (p["id"], p["type"], p["title"]) for p in original["panels"]]
    assert [[t["expr"] for t in p["targets"]] for p in again["panels"]] == [
        [t["expr"] for t in p["targets"]] for p in original["panels"]]


def test_dashboard_panels_have_unique_ids_and_do_not_overlap() -> None:
    panels = dashboard()["panels"]
    assert len({p["id"] for p in panels}) == len(panels)
    cells = set()
    for p in panels:
        g = p["gridPos"]
        assert 0 <= g["x"] and g["x"] + g["w"] <= 24, p["title"]   # Grafana's grid is 24 columns wide
        for x in range(g["x"], g["x"] + g["w"]):
            for y in range(g["y"], g["y"] + g["h"]):
                assert (x, y) not in cells, f"{p['title']} overlaps another panel at {(x, y)}"
                cells.add((x, y))


def expressions() -> list[str]:
    """Every PromQL expression of the dashboard, with Grafana's variables given concrete values."""
    out = []
    for panel in dashboard()["panels"]:
        for target in panel["targets"]:
            expr = target["expr"].replace("$__rate_interval", "5m").replace("$coordinator", ".*")
            assert "$" not in expr, expr
            out.append(expr)
    return out


def test_dashboard_queries_are_valid_promql(tmp_path: Path) -> None:
    tool = promtool()
    rules = ["groups:", "  - name: dashboard-queries", "    rules:"]
    for i, expr in enumerate(expressions()):
        rules += [f"      - record: shardsieve:dashboard_query_{i}", f"        expr: {json.dumps(expr)}"]
    path = tmp_path / "queries.yml"
    path.write_text("\n".join(rules) + "\n")
    proc = run(tool, "check", "rules", str(path), cwd=tmp_path)
    assert proc.returncode == 0, proc.stdout + proc.stderr


def metric_names_used() -> set[str]:
    """Metric names the rules and the dashboard query (histogram series map to their family)."""
    text = RULES.read_text() + "\n".join(expressions())
    names = set(re.findall(r"\b(shardsieve_[a-z0-9_]+)", text))
    return {re.sub(r"_(bucket|sum|count)$", "", n) for n in names}


def test_names_follow_the_prometheus_conventions() -> None:
    """Prometheus docs, "Metric and label naming": base units in the name (seconds, bytes,
    ratio), `_total` on counters, one prefix per daemon."""
    for name in metric_names_used():
        assert re.fullmatch(r"shardsieve_(coordinator|node)_[a-z0-9_]+", name), name
        assert not re.search(r"_(ms|milliseconds|percent|kb|mb)(_|$)", name), name
