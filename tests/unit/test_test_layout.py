"""pytest imports test files by basename (rootdir-relative packages are not used here), so two
test files with one name in different folders break collection of the whole suite."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

TESTS = Path(__file__).resolve().parents[1]


def test_every_test_file_basename_is_unique() -> None:
    names = Counter(p.name for p in TESTS.rglob("test_*.py"))
    assert [n for n, c in names.items() if c > 1] == []
