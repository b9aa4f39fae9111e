"""A history checker for cluster and container tests: no acknowledged key is ever reported absent.

Tests record every acknowledged write and delete, and every read reply, with the monotonic
times the operation started and finished. `violations()` then finds each read that reported a
key absent although a write of that key was acknowledged before the read started and no delete
of that key started between that write and the end of the read. That is the store's promise
(ARCHITECTURE.md, promises 1-3) stated over an observed history, in the style of a linearizability
check restricted to "absent" replies: a read overlapping a delete may go either way.

Found-replies are also checked: the value must be one some write of the key started before the
read ended (a read never invents data), and not one that an acknowledged overwrite had already
replaced before the read began (no acknowledged value is lost or changed, e.g. across restarts). Thread-safe; use one History per test.
"""

from __future__ import annotations

import threading
import time
from collections import defaultdict
from dataclasses import dataclass, field


@dataclass(frozen=True)
class Op:
    kind: str            # "write", "delete", "read"
    key: bytes
    start: float
    end: float
    value: bytes | None = None
    found: bool = False
    node_id: str = ""
    via: str = ""        # "coordinator" or "node"


@dataclass(frozen=True)
class Violation:
    read: Op
    write: Op | None
    why: str

    def __str__(self) -> str:
        return (f"{self.why}: key {self.read.key!r} read [{self.read.start:.3f}, {self.read.end:.3f}] "
                f"found={self.read.found} value={self.read.value!r}"
                + (f"; write acked at {self.write.end:.3f} on {self.write.node_id} via {self.write.via}"
                   if self.write else ""))


@dataclass
class History:
    clock: object = time.monotonic
    ops: list[Op] = field(default_factory=list)
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def now(self) -> float:
        return self.clock()  # type: ignore[operator]

    def _add(self, op: Op) -> Op:
        with self._lock:
            self.ops.append(op)
        return op

    def write(self, key: bytes, value: bytes, start: float, end: float | None = None, node_id: str = "",
              via: str = "coordinator") -> Op:
        """Record an acknowledged write (call only after the ack arrived)."""
        return self._add(Op("write", key, start, self.now() if end is None else end, value, True, node_id, via))

    def delete(self, key: bytes, start: float, end: float | None = None, via: str = "coordinator") -> Op:
        """Record a delete; record it even when unacknowledged (it may have happened)."""
        return self._add(Op("delete", key, start, self.now() if end is None else end, via=via))

    def read(self, key: bytes, found: bool, value: bytes | None, start: float, end: float | None = None,
             node_id: str = "") -> Op:
        """Record a read reply (found or a definite not-found; not an error)."""
        return self._add(Op("read", key, start, self.now() if end is None else end, value, found, node_id))

    def keys_written(self) -> set[bytes]:
        with self._lock:
            return {op.key for op in self.ops if op.kind == "write"}

    def live_keys(self) -> dict[bytes, bytes]:
        """Keys whose last recorded operation is an acknowledged write, with that write's value
        (for a final sweep once the load stopped)."""
        with self._lock:
            ops = sorted((op for op in self.ops if op.kind != "read"), key=lambda o: o.start)
        live: dict[bytes, bytes] = {}
        for op in ops:
            if op.kind == "write":
                live[op.key] = op.value or b""
            else:
                live.pop(op.key, None)
        return live

    def violations(self) -> list[Violation]:
        with self._lock:
            ops = list(self.ops)
        writes: dict[bytes, list[Op]] = defaultdict(list)
        deletes: dict[bytes, list[Op]] = defaultdict(list)
        for op in ops:
            if op.kind == "write":
                writes[op.key].append(op)
            elif op.kind == "delete":
                deletes[op.key].append(op)
        out: list[Violation] = []
        for r in (op for op in ops if op.kind == "read"):
            if not r.found:
                for w in writes.get(r.key, ()):
                    if w.end >= r.start:
                        continue            # not acknowledged before the read began
                    if any(d.start < r.end and d.end > w.start for d in deletes.get(r.key, ())):
                        continue            # a delete after (or overlapping) that write may explain it
                    out.append(Violation(r, w, "acknowledged key reported absent"))
                    break
            else:
                produced = [w for w in writes.get(r.key, ()) if w.value == r.value and w.start < r.end]
                if not produced:
                    out.append(Violation(r, None, "read returned a value no write produced"))
                    continue
                # An overwrite acknowledged before the read began hides every write that had been
                # acknowledged before that overwrite started: returning such a value is a lost update.
                newer = [w for w in writes.get(r.key, ()) if w.end < r.start]
                if all(any(o.start > w.end and o.value != r.value for o in newer) for w in produced):
                    out.append(Violation(r, produced[-1], "read returned a value an acknowledged overwrite replaced"))
        return out

    def assert_ok(self, limit: int = 10) -> None:
        bad = self.violations()
        if bad:
            lines = "\n".join(str(v) for v in bad[:limit])
            raise AssertionError(f"{len(bad)} history violation(s) in {len(self.ops)} operations:\n{lines}")

    def counts(self) -> dict[str, int]:
        with self._lock:
            result: dict[str, int] = defaultdict(int)
            for op in self.ops:
                result[op.kind] += 1
                if op.kind == "read" and op.found:
                    result["read_found"] += 1
            return dict(result)
