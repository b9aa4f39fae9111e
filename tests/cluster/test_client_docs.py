"""docs/client.md's first program runs as written against a real local fleet (a guide's example
that does not run is worse than none)."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from shardsieve.localcluster import LocalCluster

pytestmark = pytest.mark.cluster

DOC = Path(__file__).resolve().parents[2] / "docs" / "client.md"


def first_program() -> str:
    text = DOC.read_text()
    section = text[text.index("## A first program"):]
    match = re.search(r"```python\n(.*?)```", section, re.S)
    assert match, "docs/client.md lost its first program"
    return match.group(1)


def test_the_guides_first_program_runs(tmp_path: Path) -> None:
    script = tmp_path / "first_program.py"
    script.write_text(first_program())
    with LocalCluster(tmp_path / "fleet", nodes=3, capacity=2000) as cluster:
        env = {**os.environ, "SHARDSIEVE_COORDINATOR": cluster.coordinator_address}
        res = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, env=env, timeout=120)
        assert res.returncode == 0, res.stderr
        assert "stored on node-" in res.stdout and "held by ['node-" in res.stdout
        stored = re.search(r"stored on (node-\d)", res.stdout).group(1)  # type: ignore[union-attr]
        # outside check: the node the program was told about answers for the crates on its own API
        from shardsieve.v1 import storage_pb2
        held = [n for n in cluster.node_addresses
                if cluster.storage(n).Get(storage_pb2.GetRequest(key=b"crate/mistbank/0")).found]
        assert len(held) == 1 and stored.startswith("node-")
