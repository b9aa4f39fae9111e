"""The reference docs must not drift from the code: settings tables and documented command lines.

The source of truth is outside the docs: the settings dataclasses (node/settings.py,
coordinator/settings.py, which also generate `--help`) and the click commands themselves. A
setting added to the code without a table row, a renamed flag left in a doc, or a default
changed on one side only fails here (keeping reference docs generated-or-checked is common
practice).
"""

from __future__ import annotations

import dataclasses
import re
import shlex
from pathlib import Path

import click
import pytest

from shardsieve.coordinator.settings import ENV_PREFIX as COORDINATOR_ENV, CoordinatorSettings
from shardsieve.node.settings import ENV_PREFIX as NODE_ENV, NodeSettings
from shardsieve.cli.main import cli
from shardsieve.config import env_name

REPO = Path(__file__).resolve().parents[2]
DOCS_WITH_COMMANDS = ("README.md", "docs/cli.md", "docs/node.md", "docs/coordinator.md", "docs/security.md",
                      "docs/loadtest.md", "docs/agents.md")


def _table_rows(doc: str) -> dict[str, tuple[str, str]]:
    """`| `name` | `ENV` | default | meaning |` rows of the doc's Settings table -> {name: (env, default)}."""
    text = (REPO / doc).read_text(encoding="utf-8")
    section = re.split(r"^#+ Settings\s*$", text, maxsplit=1, flags=re.M)
    assert len(section) == 2, f"{doc} has no Settings section"
    rows = {}
    for m in re.finditer(r"^\| `([a-z0-9-]+)` \| `([A-Z0-9_]+)` \| ([^|]+) \|", section[1], flags=re.M):
        rows[m.group(1)] = (m.group(2), m.group(3).strip())
    return rows


def _expected_default(name: str, default: object) -> str:
    if isinstance(default, list) or default is None:
        return "none"
    if name.endswith("token"):
        return "empty (none)"       # a token's value is never shown, but its default is empty
    if isinstance(default, bool):
        return f"`{str(default).lower()}`"
    if isinstance(default, str) and not default:
        return "empty"
    return f"`{default}`"


@pytest.mark.parametrize("doc,cls,prefix", [
    ("docs/node.md", NodeSettings, NODE_ENV),
    ("docs/coordinator.md", CoordinatorSettings, COORDINATOR_ENV),
])
def test_settings_table_matches_the_settings_class(doc: str, cls: type, prefix: str) -> None:
    rows = _table_rows(doc)
    fields = {f.name.replace("_", "-"): f for f in dataclasses.fields(cls)}
    assert sorted(rows) == sorted(fields), f"{doc}: table rows differ from {cls.__name__} fields"
    for name, f in fields.items():
        default = f.default if f.default is not dataclasses.MISSING else f.default_factory()  # type: ignore[misc]
        env, shown = rows[name]
        assert env == env_name(prefix, f.name, f.metadata.get("env")), name
        assert shown == _expected_default(f.name, default), f"{doc}: default of {name}"


def _command_lines(text: str) -> list[str]:
    """Every `shardsieve ...` command in inline code or code blocks (continuation lines joined)."""
    lines = []
    for block in re.findall(r"```[a-z]*\n(.*?)```", text, flags=re.S):
        joined = re.sub(r"\\\n\s*", " ", block)
        lines += [ln.split("#")[0] for ln in joined.splitlines() if ln.strip().startswith("shardsieve ")]
    lines += re.findall(r"`(shardsieve [^`]+)`", re.sub(r"```.*?```", "", text, flags=re.S))
    return lines


def _resolve(words: list[str]) -> tuple[list[str], click.Command] | None:
    """Walk the click groups along `words` (alternatives like filter|node expand); None if no command."""
    ctx = click.Context(cli)
    cmd: click.Command = cli
    path: list[str] = []
    for word in words:
        if not isinstance(cmd, click.Group):
            break
        sub = cmd.get_command(ctx, word.split("|")[0])
        if sub is None:
            break
        cmd, path = sub, path + [word]
    return (path, cmd) if path else None


def test_documented_command_options_exist() -> None:
    problems = []
    for doc in DOCS_WITH_COMMANDS:
        for line in _command_lines((REPO / doc).read_text(encoding="utf-8")):
            try:
                words = shlex.split(line.replace("[", " ").replace("]", " ").replace("(", " ").replace(")", " "))
            except ValueError:
                words = line.split()
            resolved = _resolve([w for w in words[1:] if not w.startswith("-")][:2])
            if resolved is None:
                problems.append(f"{doc}: `{line.strip()}` names no shardsieve command")
                continue
            path, _ = resolved
            variants = [[*path[:-1], alt] for alt in path[-1].split("|")]
            for variant in variants:
                found = _resolve(variant)
                assert found is not None
                known = {o for p in found[1].params for o in (*p.opts, *p.secondary_opts)} | {"--help"}
                for w in words:
                    flag = w.split("=")[0].rstrip(",.;")
                    if flag.startswith("--") and len(flag) > 2 and flag not in known:
                        problems.append(f"{doc}: `{line.strip()}`: shardsieve {' '.join(variant)} has no {flag}")
    assert not problems, "\n".join(problems)
