"""The agent tests find the Redis and PostgreSQL servers where Debian's packages install them.

Debian puts redis-server in /usr/bin (package redis-server) and each PostgreSQL major version's
server in /usr/lib/postgresql/NN/bin (packages postgresql-NN, several side by side; Debian
PostgreSQL policy as described in postgresql-common's README), with only wrappers on PATH.
`.ci/os-packages.sh` installs those packages when they are missing.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import pytest

from shardsieve.testing.servers import postgres_bin_dir, redis_binary


def _executable(path: Path) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("#!/bin/sh\n")
    path.chmod(0o755)


def test_the_newest_debian_postgres_version_is_taken(tmp_path: Path) -> None:
    for version in ("9.6", "15", "17"):
        _executable(tmp_path / version / "bin" / "postgres")
    (tmp_path / "18" / "bin").mkdir(parents=True)          # a folder left without its server
    assert postgres_bin_dir(str(tmp_path)) == str(tmp_path / "17" / "bin")


def _owner(path: str) -> str:
    """The Debian package that installed `path` (the path itself, else what its symlinks lead to)."""
    for candidate in (path, os.path.realpath(path)):
        done = subprocess.run(["dpkg", "-S", candidate], capture_output=True, text=True, check=False)
        if done.returncode == 0:
            return done.stdout.split(":")[0]
    return ""


@pytest.mark.skipif(shutil.which("dpkg") is None, reason="not a Debian system (no dpkg)")
def test_the_binaries_found_come_from_debian_packages() -> None:
    redis, pg = redis_binary(), postgres_bin_dir()
    if redis is None or pg is None:
        pytest.skip("redis-server or PostgreSQL is not installed; .ci/os-packages.sh installs them")
    assert _owner(redis) == "redis-server", _owner(redis)
    assert _owner(os.path.join(pg, "postgres")).startswith("postgresql-")
    assert pg.startswith("/usr/lib/postgresql/")
