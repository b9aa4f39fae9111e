"""The built wheel installs everything under one name of ours: `shardsieve`.

The daemons' folders live at the repository's top level (node/, coordinator/) but must install
as shardsieve.node and shardsieve.coordinator: a top-level package named `node` or
`coordinator` would collide with any other distribution that ships one (Python Packaging User
Guide, "Packaging namespace packages": one distribution, one top-level name, common practice).
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def wheel(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("wheel")
    # Build from a copy of the tracked files: pip builds in the source tree and would leave
    # build/ and *.egg-info behind in the checkout.
    src = tmp_path_factory.mktemp("src")
    tracked = subprocess.run(["git", "ls-files", "-z"], cwd=ROOT, capture_output=True, check=True).stdout
    for name in filter(None, tracked.decode().split("\0")):
        if (ROOT / name).is_file():
            (src / name).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(ROOT / name, src / name)
    # --no-build-isolation: build with the setuptools already installed here (no download).
    proc = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-q",
                           "-w", str(out), str(src)], capture_output=True, text=True, timeout=240)
    assert proc.returncode == 0, proc.stderr[-2000:]
    wheels = list(out.glob("shardsieve-*.whl"))
    assert len(wheels) == 1, wheels
    return wheels[0]


def test_wheel_has_one_top_level_name(wheel: Path) -> None:
    with zipfile.ZipFile(wheel) as zf:
        names = zf.namelist()
        top_level_txt = next((n for n in names if n.endswith(".dist-info/top_level.txt")), None)
        top = {n.split("/", 1)[0] for n in names if not n.split("/", 1)[0].endswith(".dist-info")}
        assert top == {"shardsieve"}, f"the wheel installs other top-level names: {sorted(top)}"
        if top_level_txt is not None:   # setuptools writes it; it must agree
            assert zf.read(top_level_txt).decode().split() == ["shardsieve"]


def test_wheel_carries_every_package_of_the_tree(wheel: Path) -> None:
    """Every folder with an __init__.py under shardsieve/, node/ and coordinator/ is in the wheel
    at its installed place (a package missing from pyproject's list would ship broken)."""
    expected = set()
    for init in ROOT.glob("shardsieve/**/__init__.py"):
        expected.add(init.parent.relative_to(ROOT).as_posix())
    for folder in ("node", "coordinator"):
        for init in (ROOT / folder).glob("**/__init__.py"):
            expected.add("shardsieve/" + init.parent.relative_to(ROOT).as_posix())
    with zipfile.ZipFile(wheel) as zf:
        shipped = {n.rsplit("/", 1)[0] for n in zf.namelist() if n.endswith("/__init__.py")}
        assert "shardsieve/node/core.py" in zf.namelist()
        assert "shardsieve/coordinator/daemon.py" in zf.namelist()
    assert expected <= shipped, f"packages missing from the wheel: {sorted(expected - shipped)}"
