"""The README's quick start and CI must not drift apart (the CI runs exactly the README's test command)."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]


def _quick_start_commands() -> list[str]:
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    section = readme.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    return [block.strip() for block in re.findall(r"```\n(.*?)```", section, flags=re.S)]


def test_readme_opens_with_the_job_paragraph() -> None:
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    first_paragraph = readme.split("\n\n")[1]
    assert "shardsieve" in first_paragraph and "fan-out" in first_paragraph


def test_quick_start_is_two_commands_tour_then_tests() -> None:
    commands = _quick_start_commands()
    assert len(commands) == 2, commands
    assert all("\n" not in c for c in commands)
    assert commands[0].endswith("shardsieve tour")
    assert "pytest" in commands[1]


def test_ci_runs_exactly_the_readme_test_command() -> None:
    ci_lines = [line.strip() for line in (REPO / ".ci" / "run").read_text().splitlines()]
    assert _quick_start_commands()[1] in ci_lines


def test_quick_start_extras_exist() -> None:
    extras = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]["optional-dependencies"]
    for command in _quick_start_commands():
        for extra in re.findall(r"\.\[(\w+)\]", command):
            assert extra in extras, f"README installs extra [{extra}] that pyproject.toml does not define"
