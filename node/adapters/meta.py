"""The agent's own small state (epoch counter, rebuilt size) in a local JSON file.

Why a local file and not a key in the watched store: the epoch must never go back
(docs/sync-protocol.md, "Node restarts and epochs"), and a store the agent does not own can
lose it behind the agent's back (Redis FLUSHALL, a restore from an older dump), would list
it among its own keys, and may not grant the agent write access at all. The file is
replaced atomically: write a temporary file, fsync it, rename it over the old one, fsync
the folder (POSIX rename(2) replaces atomically; fsync of the folder makes the rename
durable, per the Linux fsync(2) manual page).
"""

from __future__ import annotations

import json
import os
import threading
from pathlib import Path

from shardsieve.node.store import StoreError


class MetaFile:
    """get_meta / set_meta backed by one JSON object in `path`."""

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self._lock = threading.Lock()
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            text = self.path.read_text(encoding="utf-8") if self.path.exists() else "{}"
            values = json.loads(text)
        except (OSError, ValueError) as exc:
            raise StoreError(f"cannot read the agent state file {self.path}: {exc}") from None
        if not isinstance(values, dict) or not all(isinstance(v, str) for v in values.values()):
            raise StoreError(f"the agent state file {self.path} is not a JSON object of strings; "
                             f"move it away to start over (the next epoch is then 1)")
        self._values: dict[str, str] = values

    def get_meta(self, name: str) -> str | None:
        with self._lock:
            return self._values.get(name)

    def set_meta(self, values: dict[str, str]) -> None:
        with self._lock:
            merged = {**self._values, **{k: str(v) for k, v in values.items()}}
            tmp = self.path.with_name(self.path.name + ".tmp")
            try:
                with open(tmp, "w", encoding="utf-8") as handle:
                    json.dump(merged, handle, sort_keys=True)
                    handle.flush()
                    os.fsync(handle.fileno())
                os.replace(tmp, self.path)
                folder = os.open(self.path.parent, os.O_RDONLY)
                try:
                    os.fsync(folder)
                finally:
                    os.close(folder)
            except OSError as exc:
                raise StoreError(f"cannot write the agent state file {self.path}: {exc}") from None
            self._values = merged
