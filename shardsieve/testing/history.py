"""A history checker for cluster and container tests: what a read reports must agree with the
acknowledged writes and deletes around it.

Tests record every write and delete (acknowledged, or with an unknown outcome after an error) and
every read reply, with the monotonic times the operation started and finished. `violations()`
judges each read against the operations around it, in the style of a linearizability check
(Herlihy & Wing, "Linearizability: a correctness condition for concurrent objects", ACM TOPLAS
12(3), 1990) restricted to single keys: an operation that overlaps the read may count as before
or after it. The rules are the promises of docs/architecture.md#promises stated over an observed
history (#1-no-false-negatives-once-synced, #2-read-your-writes-through-a-coordinator,
#4-nothing-acknowledged-is-lost):

- lost key: a read reports k absent although a write of k was acknowledged before the read
  started and no delete of k started between that write's start and the read's end;
- invented value: a read finds a value no write of k started before the read ended;
- lost update: a read finds a value that an acknowledged overwrite had replaced before the read
  started;
- resurrection: a read finds k although a delete of k was acknowledged before the read started
  and no write of k that may have taken effect after that delete (one that overlapped or
  followed it, acknowledged or still in flight when the read ended) exists.

Thread-safe; use one History per test.
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
    acknowledged: bool = True   # False: the call failed, so the operation may or may not have happened

    def may_follow(self, other: Op) -> bool:
        """Whether this operation may have taken effect after `other` did: it overlaps or follows
        it, or its outcome is unknown (an unacknowledged operation may still land at any time)."""
        return not self.acknowledged or self.end > other.start


@dataclass(frozen=True)
class Violation:
    read: Op
    write: Op | None     # the write (or, for a resurrection, the delete) the read contradicts
    why: str

    def __str__(self) -> str:
        return (f"{self.why}: key {self.read.key!r} read [{self.read.start:.3f}, {self.read.end:.3f}] "
                f"found={self.read.found} value={self.read.value!r}"
                + (f"; {self.write.kind} acked at {self.write.end:.3f}"
                   + (f" on {self.write.node_id}" if self.write.node_id else "") + f" via {self.write.via}"
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
              via: str = "coordinator", acknowledged: bool = True) -> Op:
        """Record a write: after its ack arrived, or with acknowledged=False after the call failed
        (it may still have happened, so it may explain a value a read finds)."""
        return self._add(Op("write", key, start, self.now() if end is None else end, value, True, node_id, via,
                            acknowledged))

    def delete(self, key: bytes, start: float, end: float | None = None, via: str = "coordinator",
               acknowledged: bool = True) -> Op:
        """Record a delete: after its ack arrived, or with acknowledged=False after the call failed
        (it may have happened, so it may explain an absent key, but nothing must stay deleted)."""
        return self._add(Op("delete", key, start, self.now() if end is None else end, via=via,
                            acknowledged=acknowledged))

    def read(self, key: bytes, found: bool, value: bytes | None, start: float, end: float | None = None,
             node_id: str = "") -> Op:
        """Record a read reply (found or a definite not-found; not an error)."""
        return self._add(Op("read", key, start, self.now() if end is None else end, value, found, node_id))

    def keys_written(self) -> set[bytes]:
        with self._lock:
            return {op.key for op in self.ops if op.kind == "write"}

    def keys_written_on(self, node_id: str) -> list[bytes]:
        """Keys of the acknowledged writes that landed on node_id, in the order recorded."""
        with self._lock:
            return [op.key for op in self.ops if op.kind == "write" and op.acknowledged and op.node_id == node_id]

    def live_keys(self) -> dict[bytes, bytes]:
        """Keys whose last recorded operation is an acknowledged write, with that write's value
        (for a final sweep once the load stopped). A key whose last operation was not
        acknowledged is left out: its state is unknown."""
        with self._lock:
            ops = sorted((op for op in self.ops if op.kind != "read"), key=lambda o: o.start)
        live: dict[bytes, bytes] = {}
        for op in ops:
            if op.kind == "write" and op.acknowledged:
                live[op.key] = op.value or b""
            else:
                live.pop(op.key, None)
        return live

    def violations(self) -> list[Violation]:
        """Every read that breaks one of the rules in the module docstring (at most one per read)."""
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
            problem = (self._absent_problem(r, writes[r.key], deletes[r.key]) if not r.found
                       else self._found_problem(r, writes[r.key], deletes[r.key]))
            if problem is not None:
                out.append(problem)
        return out

    @staticmethod
    def _absent_problem(r: Op, writes: list[Op], deletes: list[Op]) -> Violation | None:
        for w in writes:
            if not w.acknowledged or w.end >= r.start:
                continue            # not acknowledged before the read began
            if any(d.start < r.end and d.may_follow(w) for d in deletes):
                continue            # a delete after (or overlapping) that write may explain it
            return Violation(r, w, "acknowledged key reported absent")
        return None

    @staticmethod
    def _found_problem(r: Op, writes: list[Op], deletes: list[Op]) -> Violation | None:
        produced = [w for w in writes if w.value == r.value and w.start < r.end]
        if not produced:
            return Violation(r, None, "read returned a value no write produced")
        # A delete acknowledged before the read began removed the key for good, unless a write
        # started before the read ended may have landed after that delete.
        for d in deletes:
            if d.acknowledged and d.end < r.start and not any(w.start < r.end and w.may_follow(d) for w in writes):
                return Violation(r, d, "read found a key an acknowledged delete removed")
        # An overwrite acknowledged before the read began hides every write that had been
        # acknowledged before that overwrite started: returning such a value is a lost update.
        newer = [w for w in writes if w.acknowledged and w.end < r.start]
        if all(w.acknowledged and any(o.start > w.end and o.value != r.value for o in newer) for w in produced):
            return Violation(r, produced[-1], "read returned a value an acknowledged overwrite replaced")
        return None

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
