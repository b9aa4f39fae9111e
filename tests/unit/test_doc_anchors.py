"""Every section of our docs that code, tests and docs cite by anchor exists.

Code and tests cite the plan as `docs/architecture.md#anchor`, and the docs link to each other's
sections as `[text](file.md#anchor)`. An anchor is the heading's slug as GitHub renders it:
lower case, punctuation other than hyphens dropped, spaces turned into hyphens (GitHub Flavored
Markdown, the heading anchors GitHub generates; common practice to check links in CI).
"""

from __future__ import annotations

import re
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]

# The anchors the plan promises to keep (cited across the code base).
ARCHITECTURE_ANCHORS = [
    "the-job", "layout-in-data-flow-order", "words", "logic-without-io", "who-owns-which-state",
    "how-events-flow", "promises", "1-no-false-negatives-once-synced",
    "2-read-your-writes-through-a-coordinator", "3-bounded-staleness", "4-nothing-acknowledged-is-lost",
    "5-bad-input-changes-nothing", "6-every-figure-has-a-source", "geometries-come-from-a-ladder",
    "hash-once-per-key",
]

CITED = re.compile(r"\b((?:docs/)?[\w./-]+\.md)#([a-z0-9][a-z0-9-]*)")
MARKDOWN_LINK = re.compile(r"\]\(([\w./-]+\.md)?#([^)\s]+)\)")


def slug(heading: str) -> str:
    """The anchor GitHub gives a heading."""
    text = re.sub(r"[^\w\- ]", "", heading.strip().lower())
    return text.replace(" ", "-")


def anchors(doc: Path) -> set[str]:
    text = doc.read_text(encoding="utf-8")
    text = re.sub(r"^```.*?^```", "", text, flags=re.M | re.S)     # headings only outside code blocks
    return {slug(m.group(1)) for m in re.finditer(r"^#{1,6}\s+(.+?)\s*#*\s*$", text, flags=re.M)}


def tracked_text_files() -> list[Path]:
    out = subprocess.run(["git", "ls-files", "-z"], cwd=ROOT, check=True, capture_output=True).stdout
    files = [ROOT / name for name in out.decode("utf-8").split("\0") if name]
    return [f for f in files if f.is_file() and b"\0" not in f.read_bytes()]


@pytest.mark.parametrize(("heading", "expected"), [
    ("Logic without I/O", "logic-without-io"),
    ("1. No false negatives once synced", "1-no-false-negatives-once-synced"),
    ("Durability: what an acknowledged write survives", "durability-what-an-acknowledged-write-survives"),
    ("Removing a node for good (`UnlistNode`, `shardsieve unlist`)",
     "removing-a-node-for-good-unlistnode-shardsieve-unlist"),
])
def test_slug_follows_githubs_rule(heading: str, expected: str) -> None:
    assert slug(heading) == expected


def test_architecture_keeps_every_anchor_the_code_base_cites() -> None:
    found = anchors(ROOT / "docs" / "architecture.md")
    assert [a for a in ARCHITECTURE_ANCHORS if a not in found] == []


def test_every_cited_doc_anchor_exists() -> None:
    missing = []
    for path in tracked_text_files():
        text = path.read_text(encoding="utf-8", errors="replace")
        refs = [(m.group(1), m.group(2)) for m in CITED.finditer(text)]
        if path.suffix == ".md":
            refs += [(m.group(1) or path.name, m.group(2)) for m in MARKDOWN_LINK.finditer(text)]
        for target, anchor in refs:
            if anchor == "anchor":      # the citation pattern itself, `docs/architecture.md#anchor`
                continue
            candidates = [path.parent / target, ROOT / target, ROOT / "docs" / target]
            doc = next((c for c in candidates if c.is_file()), None)
            if doc is None or anchor not in anchors(doc):
                missing.append(f"{path.relative_to(ROOT)}: {target}#{anchor}")
    assert not missing, "\n".join(missing)
