"""No tracked file points outside the repository or at an issue number.

Why: an outside contributor has only the repository. The plan lives in docs/architecture.md and
is cited by anchor (`docs/architecture.md#promises`); a rule's source is a paper, an RFC, a
library's docs or a section of our docs, never a file beside the repository or an issue thread
(DEVELOPERS.md, "Style"). Every file `git ls-files` lists is checked; none is exempt.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]

# Built from pieces so this file does not match its own patterns.
_PLAN_FILE = "ARCHITECTURE" + r"\.md"
_SHARED_DIR = r"\.\./" + "shared"
_ISSUE = "iss" + "ue"

FORBIDDEN: dict[str, re.Pattern[str]] = {
    "path outside the repository": re.compile(_SHARED_DIR),
    "plan file outside the repository": re.compile(_PLAN_FILE),   # case-sensitive: docs/architecture.md is ours
    # the word followed by a number, with or without "#"
    "issue number": re.compile(rf"\b{_ISSUE}s?\s*#?\s*\d+", re.IGNORECASE),
    # the word followed by "point" and a number
    "point of an issue": re.compile(rf"\b{_ISSUE},?\s+points?\s+\d+", re.IGNORECASE),
    # "point" and a number, then "of (the) ..." and the word
    "point number of an issue": re.compile(rf"\bpoints?\s+\d+[\w\s,()-]{{0,30}}?\bof\s+(?:the\s+|our\s+)?{_ISSUE}\b",
                                           re.IGNORECASE),
}


def tracked_files() -> list[Path]:
    git = shutil.which("git")
    if git is None or not (ROOT / ".git").exists():
        pytest.fail("this check needs git and a git checkout: it reads `git ls-files`")
    out = subprocess.run([git, "ls-files", "-z"], cwd=ROOT, check=True, capture_output=True).stdout
    return [ROOT / name for name in out.decode("utf-8").split("\0") if name]


def offences(text: str) -> list[str]:
    """One 'line N: what (matched text)' entry per forbidden reference in text."""
    found = []
    for lineno, line in enumerate(text.splitlines(), 1):
        for what, pattern in FORBIDDEN.items():
            for match in pattern.finditer(line):
                found.append(f"line {lineno}: {what} ({match.group(0)!r})")
    return found


@pytest.mark.parametrize("text, expected", [
    (f"see {'..'}/shared/plan", "path outside the repository"),
    (f"{'ARCHITECTURE'}.md promise 4", "plan file outside the repository"),
    (f"as {_ISSUE} 12 asks", "issue number"),
    (f"({_ISSUE.capitalize()} #4)", "issue number"),
    (f"Rebuild ({_ISSUE} point 5)", "point of an issue"),
    (f"see point 3 of {_ISSUE} 7", "point number of an issue"),
    (f"points 6 and 8 of the {_ISSUE}", "point number of an issue"),
])
def test_each_pattern_catches_what_it_names(text: str, expected: str) -> None:
    assert any(expected in entry for entry in offences(text)), (text, offences(text))


@pytest.mark.parametrize("text", [
    "docs/architecture.md#1-no-false-negatives-once-synced",
    "the certificate is issued to 'node-2'",
    "the issuer name of the CA",
    "a 64-bit point 3 ways",
])
def test_ordinary_text_is_not_flagged(text: str) -> None:
    assert offences(text) == []


def test_no_tracked_file_points_outside_the_repository() -> None:
    files = tracked_files()
    assert files, "git ls-files listed nothing"
    failures = []
    for path in files:
        if not path.is_file():    # deleted in the work tree but still tracked
            continue
        data = path.read_bytes()
        if b"\0" in data:         # binary
            continue
        found = offences(data.decode("utf-8", errors="replace"))
        if found:
            failures.append(f"{path.relative_to(ROOT)}: " + "; ".join(found))
    assert not failures, "references outside the repository or to issues:\n" + "\n".join(failures)
