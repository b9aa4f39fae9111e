"""The image itself: daemons run as a non-root user and Docker's own healthcheck (the gRPC health
probe baked into compose/Dockerfile) turns a serving coordinator "healthy".

Reference: the Docker Engine API's container state (`State.Health.Status`, values starting /
healthy / unhealthy) and the gRPC health checking protocol (grpc.health.v1, SERVING), which the
probe speaks.
"""

from __future__ import annotations

import pytest

from shardsieve.testing.procs import wait_until

pytestmark = [pytest.mark.container, pytest.mark.cluster, pytest.mark.timeout(120)]


def test_daemon_runs_as_non_root_and_docker_reports_it_healthy(cluster) -> None:
    coordinator = cluster.start_coordinator()
    exit_code, output = coordinator.wrapped.exec_run(["id", "-u"])
    assert exit_code == 0 and int(output.decode().strip()) != 0, output

    def health() -> str:
        coordinator.wrapped.reload()
        return coordinator.wrapped.attrs["State"].get("Health", {}).get("Status", "none")

    # The HEALTHCHECK runs every 5 s; the first verdict comes within one interval or two.
    wait_until(lambda: health() == "healthy", 30, interval=0.2,
               message=lambda: f"docker to report {coordinator.name} healthy (now {health()})")

    # The same probe, run by hand in the container, fails for an address where nothing listens.
    exit_code, output = coordinator.wrapped.exec_run(["python3", "-m", "shardsieve.cli.health", "127.0.0.1:1"])
    assert exit_code == 1 and b"unreachable" in output, output
