"""Opt-in tests of the property suite: a test marked `full_simulation` runs only when the
`-m` expression names that marker (`pytest -m full_simulation ...`); every other run
deselects it, so the default suite stays within its CPU budget (DEVELOPERS.md, "Running
tests")."""

from __future__ import annotations

import pytest

OPT_IN = "full_simulation"


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    if OPT_IN in (config.option.markexpr or ""):
        return
    chosen = [item for item in items if item.get_closest_marker(OPT_IN) is None]
    if len(chosen) < len(items):
        config.hook.pytest_deselected(items=[item for item in items if item.get_closest_marker(OPT_IN)])
        items[:] = chosen
