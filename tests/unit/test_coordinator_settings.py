"""`shardsieve coordinator` settings: flags > environment > config file > defaults (docs/coordinator.md,
"Settings").

Precedence is the documented rule of shardsieve.config (flags win over environment over file
over defaults: common practice for twelve-factor style daemons). The CLI is driven with click's
test runner and the daemon entry point replaced, so no process starts.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest
from click.testing import CliRunner

import shardsieve.coordinator.daemon
from shardsieve.coordinator.cli import coordinator_command
from shardsieve.coordinator.settings import ENV_PREFIX, CoordinatorSettings
from shardsieve.config import env_name


@pytest.fixture
def captured(monkeypatch: pytest.MonkeyPatch) -> list[CoordinatorSettings]:
    seen: list[CoordinatorSettings] = []
    monkeypatch.setattr(shardsieve.coordinator.daemon, "run", lambda s: seen.append(s) or 0)
    for f in dataclasses.fields(CoordinatorSettings):
        monkeypatch.delenv(env_name(ENV_PREFIX, f.name, f.metadata.get("env")), raising=False)
    return seen


def test_flags_beat_env_beat_file(tmp_path: Path, captured: list[CoordinatorSettings]) -> None:
    cfg = tmp_path / "coord.toml"
    cfg.write_text('[coordinator]\nid = "coord-from-file"\nlisten = "127.0.0.1:7411"\ngrowth = 3.0\n'
                   'stale-after-s = 5.0\nmode = "fast"\nmetrics-port = 9411\n')
    env = {"SHARDSIEVE_COORDINATOR_GROWTH": "4.0", "SHARDSIEVE_COORDINATOR_MODE": "safe",
           "SHARDSIEVE_COORDINATOR_MAX_CONCURRENT_REBUILDS": "3"}
    result = CliRunner().invoke(coordinator_command, ["--config", str(cfg), "--mode", "fast",
                                                      "--metrics-port", "9412"], env=env)
    assert result.exit_code == 0, result.output
    s = captured[-1]
    assert (s.id, s.listen, s.stale_after_s) == ("coord-from-file", "127.0.0.1:7411", 5.0)   # file only
    assert s.growth == 4.0 and s.max_concurrent_rebuilds == 3                               # env beats file
    assert s.mode == "fast" and s.metrics_port == 9412                                      # flag beats env
    # Documented defaults (docs/coordinator.md, "Settings"): stale-after 2 s, ratio 2, safe mode, shrink below a quarter, one rebuild at a time.
    d = CoordinatorSettings()
    assert (d.stale_after_s, d.saturation_ratio, d.growth, d.mode, d.shrink_below, d.max_concurrent_rebuilds) == \
        (2.0, 2.0, 2.0, "safe", 0.25, 1)


@pytest.mark.parametrize("args, named", [
    (["--mode", "reckless"], "'mode'"),
    (["--listen", "nowhere"], "'listen'"),
    (["--growth", "abc"], "growth"),
    (["--target-fpr", "1.5"], "target"),
    (["--locate-threads", "-1"], "'locate-threads'"),
])
def test_invalid_setting_is_one_line_naming_it(args: list[str], named: str,
                                               captured: list[CoordinatorSettings]) -> None:
    result = CliRunner().invoke(coordinator_command, args)
    assert result.exit_code == 2
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1 and named in lines[0], result.output
    assert not captured


def test_unknown_key_in_the_file_is_refused(tmp_path: Path, captured: list[CoordinatorSettings]) -> None:
    cfg = tmp_path / "coord.toml"
    cfg.write_text('[coordinator]\ngrowht = 3.0\n')
    result = CliRunner().invoke(coordinator_command, ["--config", str(cfg)])
    assert result.exit_code == 2 and "growht" in result.output and not captured
