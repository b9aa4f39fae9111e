"""The daemons run under the strictest memory rule the example units set.

compose/systemd/*.service set MemoryDenyWriteExecute=yes: no memory may be writable and
executable at once, and none may become executable later (systemd.exec(5)). A library that
generates code at run time would crash under it. On Linux 6.3 and newer the same rule can be
set on a process without systemd, with prctl(PR_SET_MDWE, PR_MDWE_REFUSE_EXEC_GAIN) (prctl(2));
it is inherited across fork and execve. This test starts a coordinator and a node under it and
drives writes, reads, a rebuild and a status through them.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from shardsieve.testing.procs import free_port, start_daemon, wait_until

pytestmark = pytest.mark.cluster

PR_SET_MDWE = 65                 # linux/prctl.h
PR_MDWE_REFUSE_EXEC_GAIN = 1

# Sets the rule on itself, proves it holds, then becomes the daemon (the rule survives execve).
LAUNCHER = r"""
import ctypes, mmap, os, sys
libc = ctypes.CDLL(None, use_errno=True)
if libc.prctl(65, 1, 0, 0, 0) != 0:   # PR_SET_MDWE, PR_MDWE_REFUSE_EXEC_GAIN
    sys.exit(f"prctl(PR_SET_MDWE) failed: errno {ctypes.get_errno()}")
try:
    mmap.mmap(-1, 4096, prot=mmap.PROT_READ | mmap.PROT_WRITE | mmap.PROT_EXEC)
    sys.exit("a writable and executable mapping was allowed: the rule is not in force")
except OSError:
    pass
os.execv(sys.executable, [sys.executable, "-m", "shardsieve.cli.main", *sys.argv[1:]])
"""


def mdwe_supported() -> bool:
    """Whether this kernel takes PR_SET_MDWE (asked in a child, which the rule then binds)."""
    probe = subprocess.run([sys.executable, "-c", f"import ctypes, sys; "
                            f"sys.exit(ctypes.CDLL(None).prctl({PR_SET_MDWE}, {PR_MDWE_REFUSE_EXEC_GAIN}, 0, 0, 0) != 0)"])
    return probe.returncode == 0


def run_cli(coordinator: str, *args: str) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "SHARDSIEVE_CONFIG": "", "COLUMNS": "200"}
    env.pop("SHARDSIEVE_TOKEN", None)
    return subprocess.run([sys.executable, "-m", "shardsieve.cli.main", *args, "--coordinator", coordinator],
                          capture_output=True, text=True, env=env, timeout=120)


def test_daemons_work_with_memory_deny_write_execute(tmp_path: Path) -> None:
    if not mdwe_supported():
        pytest.skip("this kernel has no PR_SET_MDWE (Linux 6.3 or newer)")
    coord_addr = f"127.0.0.1:{free_port()}"
    node_addr = f"127.0.0.1:{free_port()}"
    launcher = [sys.executable, "-c", LAUNCHER]
    coordinator = start_daemon(
        [*launcher, "coordinator", "--listen", coord_addr, "--allow-plaintext", "true", "--log-format", "text"],
        tmp_path / "coordinator.log", health_address=coord_addr)
    node = start_daemon(
        [*launcher, "node", "--id", "mdwe-1", "--listen", node_addr, "--data", str(tmp_path / "data"),
         "--coordinator", coord_addr, "--allow-plaintext", "true", "--capacity", "2000", "--log-format", "text"],
        tmp_path / "node.log", health_address=node_addr)
    try:
        wait_until(lambda: run_cli(coord_addr, "locate", "kelp/none").returncode == 0, 30,
                   message="the node synced with the coordinator")
        put = run_cli(coord_addr, "put", "kelp/bed-17", "harvested")
        assert put.returncode == 0, put.stderr
        got = run_cli(coord_addr, "get", "kelp/bed-17")
        assert (got.returncode, got.stdout.strip()) == (0, "harvested"), got.stderr
        rebuild = run_cli(coord_addr, "rebuild", "mdwe-1", "--capacity", "8000", "--wait", "--json")
        assert rebuild.returncode == 0, rebuild.stderr
        got = run_cli(coord_addr, "get", "kelp/bed-17")
        assert (got.returncode, got.stdout.strip()) == (0, "harvested"), got.stderr
        wait_until(lambda: run_cli(coord_addr, "status", "--json").returncode == 0, 30, message="status answers")
        assert coordinator.alive() and node.alive()
    finally:
        node.stop()
        coordinator.stop()
    for log in ("coordinator.log", "node.log"):
        text = (tmp_path / log).read_text()
        assert "Traceback" not in text, text[-3000:]
