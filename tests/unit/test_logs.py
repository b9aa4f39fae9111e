"""Structured logs: one JSON object per line carrying every `extra=` field.

What the daemons log is in docs/node.md ("Operations") and docs/coordinator.md ("Accounting and
saturation": every decision is logged with its numbers).

Reference: the json module parses each formatted line back (RFC 8259 JSON), so the check does
not depend on the formatter's own encoding.
"""

from __future__ import annotations

import json
import logging

from shardsieve.logs import JsonFormatter, TextFormatter


def _record(**extra: object) -> logging.LogRecord:
    record = logging.LogRecord("shardsieve.coordinator.fleet", logging.INFO, __file__, 1, "monitor decision",
                               (), None)
    record.__dict__.update(extra)
    return record


def test_json_line_has_standard_fields_and_every_extra() -> None:
    line = JsonFormatter("coordinator", "coord-kelp-1").format(
        _record(node_id="shed-03", action="flag", ratio=2.0, keys=1000, detail=object()))
    assert "\n" not in line
    doc = json.loads(line)
    assert doc["msg"] == "monitor decision" and doc["level"] == "info" and doc["coordinator"] == "coord-kelp-1"
    assert doc["logger"] == "shardsieve.coordinator.fleet" and doc["ts"].endswith("Z")
    assert (doc["node_id"], doc["action"], doc["ratio"], doc["keys"]) == ("shed-03", "flag", 2.0, 1000)
    assert isinstance(doc["detail"], str)      # non-JSON values are written as text, never dropped


def test_text_line_carries_the_same_fields_as_key_value_pairs() -> None:
    line = TextFormatter().format(_record(node_id="shed-03", action="rebuild"))
    assert line.split(" ", 1)[1].startswith("INFO") and line.endswith("monitor decision node_id=shed-03 action=rebuild")
