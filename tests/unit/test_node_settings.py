"""`shardsieve node` settings: flags > environment > config file > defaults; bad values fail on one line.

Precedence is the documented rule of shardsieve.config (flags win over environment over
file over defaults: common practice for twelve-factor style daemons); the CLI is driven with
click's own test runner and the daemon entry point replaced, so no process starts.
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import pytest
from click.testing import CliRunner

import shardsieve.node.daemon
from shardsieve.node.cli import node_command
from shardsieve.node.settings import NodeSettings


@pytest.fixture
def captured(monkeypatch: pytest.MonkeyPatch) -> list[NodeSettings]:
    seen: list[NodeSettings] = []

    def fake_run(settings: NodeSettings) -> int:
        seen.append(settings)
        return 0

    monkeypatch.setattr(shardsieve.node.daemon, "run", fake_run)
    for f in dataclasses.fields(NodeSettings):
        monkeypatch.delenv(f"SHARDSIEVE_NODE_{f.name.upper()}", raising=False)
    return seen


def test_help_documents_every_setting_and_default() -> None:
    result = CliRunner().invoke(node_command, ["--help"])
    assert result.exit_code == 0
    text = " ".join(result.output.split())
    for f in dataclasses.fields(NodeSettings):
        flag = "--" + f.name.replace("_", "-")
        assert flag in text, flag
        assert f"SHARDSIEVE_NODE_{f.name.upper()}" in text
        # docs/node.md, "Settings": every setting's own entry states its default
        entry = text[text.index(flag + " "):].split(f"SHARDSIEVE_NODE_{f.name.upper()}")[0]
        assert "[default:" in entry, (flag, entry)
    assert text.count("[default:") == len(dataclasses.fields(NodeSettings))
    for literal in ("default: 1024;", "default: 1048576;", "default: 'full';", "default: 'sqlite';",
                    "default: 100000;", "default: 0.01;"):
        assert literal in text, literal   # the dataclass defaults, as documented in docs/node.md
    assert "default: 50" in text          # push interval default shown
    assert "power loss" in text           # durability of the sync levels documented


def test_flags_beat_env_beat_file(tmp_path: Path, captured: list[NodeSettings]) -> None:
    cfg = tmp_path / "node.toml"
    cfg.write_text('[node]\nid = "from-file"\ncapacity = 111\nfpr = 0.05\n'
                   'coordinator = ["127.0.0.1:9001"]\npush-interval-ms = 20\n')
    env = {"SHARDSIEVE_NODE_CAPACITY": "222", "SHARDSIEVE_NODE_FPR": "0.02"}
    result = CliRunner().invoke(node_command, ["--config", str(cfg), "--fpr", "0.001",
                                               "--coordinator", "127.0.0.1:9002", "--coordinator", "127.0.0.1:9003"],
                                env=env)
    assert result.exit_code == 0, result.output
    s = captured[-1]
    assert s.id == "from-file"                   # file only
    assert s.capacity == 222                     # env beats file
    assert s.fpr == 0.001                        # flag beats env
    assert s.push_interval_ms == 20
    assert s.coordinator == ["127.0.0.1:9002", "127.0.0.1:9003"]
    assert s.sync_level == "full" and s.max_key_bytes == 1024 and s.max_value_bytes == 1 << 20


@pytest.mark.parametrize("args, named", [
    (["--fpr", "1.5"], "'fpr'"),
    (["--fpr", "abc"], "'fpr'"),
    (["--capacity", "0"], "'capacity'"),
    (["--listen", "nowhere"], "'listen'"),
    (["--coordinator", "host:99999"], "'coordinator'"),
    (["--sync-level", "sometimes"], "'sync-level'"),
    (["--max-batch", "0"], "'max-batch'"),
    (["--push-interval-ms", "-5"], "'push-interval-ms'"),
])
def test_invalid_setting_is_one_line_naming_it(args: list[str], named: str, captured: list[NodeSettings]) -> None:
    result = CliRunner().invoke(node_command, ["--id", "n1", *args])
    assert result.exit_code != 0
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1, result.output
    assert named in lines[0]
    assert not captured


@pytest.mark.parametrize("node_id", ["n\u043ede-1", ".", "..", "kelp/shed-1", "kelp\x01", "Kelp-1", "-kelp",
                                     "k" * 65])
def test_an_id_outside_the_alphabet_stops_the_node_with_one_line(node_id: str, captured: list[NodeSettings],
                                                                 tmp_path: Path) -> None:
    # docs/node.md, "Node ids": exit 2, one line naming the setting, the character and the rule
    for source in ("flag", "environment", "file"):
        cfg = tmp_path / "node.toml"
        # a JSON string is a TOML basic string (TOML 1.0, "String": the same escapes)
        cfg.write_text(f"[node]\nid = {json.dumps(node_id)}\n" if source == "file" else "[node]\n")
        args = ["--id", node_id] if source == "flag" else []
        env = {"SHARDSIEVE_NODE_ID": node_id} if source == "environment" else {}
        result = CliRunner().invoke(node_command, [*args, "--config", str(cfg)], env=env)
        assert result.exit_code == 2, (source, result.output)
        lines = [line for line in result.output.splitlines() if line.strip()]
        assert len(lines) == 1, result.output
        assert "'id'" in lines[0] and "a node id is 1 to 64 characters" in lines[0], lines[0]
    assert not captured


def test_missing_id_is_named(captured: list[NodeSettings]) -> None:
    result = CliRunner().invoke(node_command, [])
    assert result.exit_code != 0 and "'id'" in result.output


def test_unknown_file_key_is_refused(tmp_path: Path, captured: list[NodeSettings]) -> None:
    cfg = tmp_path / "node.toml"
    cfg.write_text('[node]\nid = "n"\ncapacty = 5\n')
    result = CliRunner().invoke(node_command, ["--config", str(cfg)])
    assert result.exit_code != 0 and "capacty" in result.output


def test_the_daemon_refuses_the_in_memory_store() -> None:
    # Acknowledged writes must survive a restart (docs/architecture.md#4-nothing-acknowledged-is-lost):
    # memory is unit-test only.
    from shardsieve.node.settings import NodeSettings
    from shardsieve.config import ConfigError, load_settings

    with pytest.raises(ConfigError, match="unit tests only"):
        load_settings(NodeSettings, environ={}, overrides={"id": "n1", "store": "memory"})
