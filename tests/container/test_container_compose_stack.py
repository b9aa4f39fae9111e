"""compose/docker-compose.yml brings up 2 coordinators + 4 nodes that turn healthy, and its
load-test job runs against them with zero false negatives.

Reference: the Compose file format as read by docker-compose (`config` validates it), Docker's
container health states, and the load tester's own contract (exit 0 only when no seeded key was
reported absent; `shardsieve loadtest --help`).
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import time
import urllib.request
from pathlib import Path

import pytest

pytestmark = [pytest.mark.container, pytest.mark.cluster, pytest.mark.timeout(300)]

COMPOSE_FILE = Path(__file__).resolve().parents[2] / "compose" / "docker-compose.yml"
DAEMONS = ["coordinator-1", "coordinator-2", "node-1", "node-2", "node-3", "node-4"]


def _compose(project: str, *args: str, timeout: float = 120) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ)
    env.setdefault("SHARDSIEVE_IMAGE", os.environ.get("SHARDSIEVE_IMAGE", "shardsieve:dev"))
    return subprocess.run(["docker-compose", "-p", project, "-f", str(COMPOSE_FILE), *args],
                          capture_output=True, text=True, timeout=timeout, env=env)


def _health(container: str) -> str:
    out = subprocess.run(["docker", "inspect", "--format", "{{json .State.Health}}", container],
                         capture_output=True, text=True, timeout=30)
    if out.returncode != 0 or out.stdout.strip() in ("", "null"):
        return "none"
    return json.loads(out.stdout)["Status"]


def test_compose_fleet_turns_healthy_and_the_load_test_finds_every_key(docker_client) -> None:  # noqa: ANN001
    if shutil.which("docker-compose") is None:
        pytest.skip("docker-compose is not installed (.ci/docker-setup.sh installs it)")
    project = f"sscompose{os.getpid()}"
    checked = _compose(project, "config", "-q")
    assert checked.returncode == 0, checked.stderr
    try:
        up = _compose(project, "up", "-d", "--no-build", *DAEMONS, timeout=180)
        assert up.returncode == 0, up.stderr
        ids = {name: _compose(project, "ps", "-q", name).stdout.strip() for name in DAEMONS}
        assert all(ids.values()), ids
        deadline = time.monotonic() + 90
        states: dict[str, str] = {}
        while time.monotonic() < deadline:
            states = {name: _health(cid) for name, cid in ids.items()}
            if all(s == "healthy" for s in states.values()):
                break
            time.sleep(0.5)   # polling interval of this deadline-bound wait
        assert all(s == "healthy" for s in states.values()), states

        # The metrics ports are published on the host (Prometheus text format, prometheus_client).
        for port, family in ((9401, b"shardsieve_coordinator_lookups"), (9402, b"shardsieve_coordinator_lookups"),
                             *((9500 + i, b"shardsieve_node_keys") for i in range(1, 5))):
            body = urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=10).read()
            assert family in body, (port, body[:300])

        # The job's own command, smaller: through the second coordinator this time.
        run = _compose(project, "run", "--rm", "--no-deps", "loadtest", "loadtest", "--coordinator",
                       "coordinator-2:7400", "--keys", "2000", "--count", "2000", "--seed", "3",
                       "--routable-timeout", "60", "--json", timeout=240)
        assert run.returncode == 0, f"load test failed (exit {run.returncode}):\n{run.stdout[-3000:]}\n{run.stderr[-2000:]}"
        report = json.loads(run.stdout[run.stdout.index("{"):])
        assert report["false_negatives"] == 0 and report["nodes"] == 4, {k: report.get(k) for k in
                                                                       ("false_negatives", "nodes", "lookups")}
    finally:
        logs = _compose(project, "logs", "--no-color", "--tail", "20").stdout
        down = _compose(project, "down", "-v", "--remove-orphans", timeout=180)
        if down.returncode != 0:
            print(f"docker-compose down failed: {down.stderr}\n{logs}")
