"""A listen address belongs to one daemon: a second coordinator or node started on a taken port
exits at once with exit code 3 and one line naming the address, and the first keeps serving
(docs/coordinator.md and docs/node.md, "Exit codes"). Without SO_REUSEPORT a bound TCP port
is exclusive (socket(7)); gRPC would set it by default, and both would log "serving".
"""

from __future__ import annotations

import os
import subprocess
from pathlib import Path

import pytest

from shardsieve.daemon_runner import EXIT_ADDRESS_IN_USE
from shardsieve.testing.procs import free_port, health_status, shardsieve_argv, start_daemon

pytestmark = pytest.mark.cluster

ENV = {**os.environ, "SHARDSIEVE_NODE_ALLOW_PLAINTEXT": "true", "SHARDSIEVE_COORDINATOR_ALLOW_PLAINTEXT": "true"}


def second_start(argv: list[str]) -> subprocess.CompletedProcess[str]:
    return subprocess.run(argv, capture_output=True, text=True, timeout=60, env=ENV)


@pytest.mark.parametrize("role", ["coordinator", "node"])
def test_a_second_daemon_on_a_taken_port_exits_with_one_line(tmp_path: Path, role: str) -> None:
    address = f"127.0.0.1:{free_port()}"

    def argv(name: str) -> list[str]:
        if role == "coordinator":
            return shardsieve_argv("coordinator", "--listen", address, "--id", name, "--log-format", "text")
        return shardsieve_argv("node", "--id", name, "--listen", address, "--data", str(tmp_path / name),
                               "--log-format", "text")

    first = start_daemon(argv("kelp-first"), tmp_path / "first.log", health_address=address)
    try:
        clash = second_start(argv("kelp-second"))
        assert clash.returncode == EXIT_ADDRESS_IN_USE == 3, clash.stderr
        lines = [line for line in clash.stderr.splitlines() if line.strip()]
        assert len(lines) == 1, clash.stderr
        assert address in lines[0] and "cannot listen" in lines[0] and "Traceback" not in clash.stderr
        assert first.alive() and health_status(address) == 1          # 1: SERVING
    finally:
        assert first.stop() == 0
    assert "serving" in first.log_text()
