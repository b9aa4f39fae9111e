"""Structured logs for both daemons: one JSON object per line, or a short text line.

Fields passed with `extra=` become keys of the JSON object (or key=value pairs in text),
so a log line carries its numbers in a form a log pipeline can filter on.
"""

from __future__ import annotations

import json
import logging
import sys
import time
from typing import Any

_STD_ATTRS = set(logging.LogRecord("", 0, "", 0, "", (), None).__dict__) | {"message", "asctime"}


def _extras(record: logging.LogRecord) -> dict[str, Any]:
    return {k: v for k, v in record.__dict__.items() if k not in _STD_ATTRS and not k.startswith("_")}


class JsonFormatter(logging.Formatter):
    """ts, level, logger, the daemon's role and id (e.g. node=shed-01), msg, plus every `extra` field."""

    def __init__(self, role: str, daemon_id: str) -> None:
        super().__init__()
        self.role = role
        self.daemon_id = daemon_id

    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, Any] = {
            "ts": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created)) + f".{int(record.msecs):03d}Z",
            "level": record.levelname.lower(), "logger": record.name, self.role: self.daemon_id,
            "msg": record.getMessage(),
        }
        for key, value in _extras(record).items():
            out[key] = value if isinstance(value, (int, float, str, bool, type(None))) else str(value)
        if record.exc_info:
            out["exc"] = self.formatException(record.exc_info)
        return json.dumps(out, separators=(",", ":"))


class TextFormatter(logging.Formatter):
    """HH:MM:SS LEVEL message key=value ..."""

    def format(self, record: logging.LogRecord) -> str:
        extras = " ".join(f"{k}={v}" for k, v in _extras(record).items())
        base = f"{time.strftime('%H:%M:%S', time.gmtime(record.created))} {record.levelname:<7} {record.getMessage()}"
        text = f"{base} {extras}".rstrip()
        if record.exc_info:
            text += "\n" + self.formatException(record.exc_info)
        return text


def setup_logging(role: str, daemon_id: str, log_format: str, log_level: str) -> None:
    """Send every log record to stderr in the chosen format (replaces existing root handlers)."""
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonFormatter(role, daemon_id) if log_format == "json" else TextFormatter())
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(log_level.upper())
