"""The example systemd units in compose/systemd/ are checked by systemd's own tool.

`systemd-analyze verify` loads a unit the way the service manager does and reports unknown
settings, bad values and a missing executable; `systemd-analyze security --offline=true`
scores its sandboxing (systemd-analyze(1), systemd 250 and newer). The tool comes from Debian's
systemd package, which `.ci/run` installs when it is missing; outside CI the test skips, saying
why, on a machine without it.
"""

from __future__ import annotations

import os
import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
UNITS = sorted((ROOT / "compose" / "systemd").glob("*.service"))
INSTALLED_SCRIPT = "/opt/shardsieve/bin/shardsieve"
# Exposure on systemd's 0..10 scale; 2.0 and below is what the tool itself calls "OK".
MAX_EXPOSURE = 2.0


def analyze() -> str:
    tool = shutil.which("systemd-analyze")
    if tool is None:
        if os.environ.get("CI"):
            pytest.fail("systemd-analyze is missing: .ci/run installs Debian's systemd package")
        pytest.skip("systemd-analyze is not installed (Debian package systemd)")
    return tool


def local_copy(unit: Path, tmp_path: Path) -> Path:
    """The unit with ExecStart pointing at this environment's script (verify checks it exists)."""
    script = Path(sys.executable).with_name("shardsieve")
    assert script.exists(), script
    copy = tmp_path / unit.name
    copy.write_text(unit.read_text().replace(INSTALLED_SCRIPT, str(script)))
    return copy


def test_both_daemons_have_a_unit() -> None:
    assert [u.name for u in UNITS] == ["shardsieve-coordinator.service", "shardsieve-node.service"]


@pytest.mark.parametrize("unit", UNITS, ids=lambda u: u.stem)
def test_unit_passes_systemd_verify(unit: Path, tmp_path: Path) -> None:
    tool = analyze()
    proc = subprocess.run([tool, "verify", str(local_copy(unit, tmp_path))], capture_output=True, text=True,
                          timeout=60)
    assert proc.returncode == 0, proc.stderr
    ours = [line for line in proc.stderr.splitlines() if unit.name in line]
    assert ours == [], ours


@pytest.mark.parametrize("unit", UNITS, ids=lambda u: u.stem)
def test_unit_sandboxing_scores_ok(unit: Path, tmp_path: Path) -> None:
    tool = analyze()
    proc = subprocess.run([tool, "security", "--offline=true", f"--threshold={int(MAX_EXPOSURE * 10)}",
                           str(local_copy(unit, tmp_path))], capture_output=True, text=True, timeout=60)
    found = re.search(r"Overall exposure level for \S+: (\d+\.\d)", proc.stdout)
    assert found, proc.stdout[-2000:] + proc.stderr
    assert float(found.group(1)) <= MAX_EXPOSURE, proc.stdout[-3000:]
    assert proc.returncode == 0, proc.stderr


@pytest.mark.parametrize("unit", UNITS, ids=lambda u: u.stem)
def test_exec_start_uses_real_options(unit: Path) -> None:
    """Every flag the unit passes exists in that daemon's --help, and reload sends SIGHUP (the
    token-file reload both daemons implement, docs/security.md)."""
    text = unit.read_text()
    exec_start = shlex.split(re.search(r"^ExecStart=(.+)$", text, re.M).group(1))
    assert exec_start[0] == INSTALLED_SCRIPT
    daemon = exec_start[1]
    assert daemon in ("node", "coordinator")
    help_text = subprocess.run([sys.executable, "-m", "shardsieve.cli.main", daemon, "--help"],
                               capture_output=True, text=True, timeout=60, env={**os.environ, "COLUMNS": "200"}).stdout
    for flag in (a for a in exec_start[2:] if a.startswith("--")):
        assert re.search(rf"(^|\s){re.escape(flag)}\b", help_text), flag
    assert re.search(r"^ExecReload=/bin/kill -HUP \$MAINPID$", text, re.M)
    assert re.search(r"^User=shardsieve$", text, re.M)
