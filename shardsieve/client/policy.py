"""Which coordinator to ask, and whether to try a failed call again: plain objects, no I/O.

Failover (`CoordinatorPool`). Coordinators are given in order of preference (the first is the
one to use, e.g. the nearest; every coordinator holds the same replicas, so any can answer).
A call goes to the most preferred coordinator that is not resting. A coordinator that could
not be reached (no answer, connection refused, no answer within the connect timeout) rests
for `rest_s`, doubling on each failure in a row up to `max_rest_s`, and the call moves on to
the next. Once its rest is over, the next call tries it again: the client comes back to its
preferred coordinator by itself. When every coordinator rests, the one whose rest ends first
is tried (a call never waits for a rest to end).

Retries (`RetryPolicy`, `may_retry`). Only transient failures are retried, and only when a
retry cannot apply anything twice:
- reads (get, get_many, locate, locate_many) and deletes (delete, delete_many; deleting twice
  leaves the same state) are retried on `Unavailable` (the coordinator, or a candidate node,
  could not be reached);
- writes (put, put_many) are retried only when the failure proves nothing was written: the
  coordinator could not be reached before the call was sent, or its ErrorDetail says
  WRITE_EFFECT_NONE (e.g. a candidate could not be asked before placing the key). A write that
  may have been applied (a timeout, a node that did not acknowledge) is never retried;
- nothing else is retried (invalid input, auth, not found, refused, overloaded).
Attempts wait a jittered exponential backoff between them ("full jitter": uniform between 0
and min(max_backoff, initial x multiplier^n)), so clients that failed together do not retry
together, as in gRPC's connection backoff (grpc docs, "Connection Backoff Protocol"). Every
attempt shares the call's one deadline: a retry never extends it.
"""

from __future__ import annotations

import random
from dataclasses import dataclass, field
from typing import Callable

from shardsieve.client.errors import CoordinatorUnavailable, ShardsieveError, Unavailable

READ = "read"      # idempotent: retried on any Unavailable
DELETE = "delete"  # idempotent in effect: retried on any Unavailable
WRITE = "write"    # retried only when nothing was applied


@dataclass(frozen=True)
class RetryPolicy:
    """How often and how soon a failed call is tried again (see the module docstring)."""

    attempts: int = 3                  # tries per call, the first included
    initial_backoff_s: float = 0.05
    max_backoff_s: float = 1.0
    multiplier: float = 2.0

    def __post_init__(self) -> None:
        if self.attempts < 1:
            raise ValueError(f"attempts must be at least 1, got {self.attempts}")
        if not 0 <= self.initial_backoff_s <= self.max_backoff_s:
            raise ValueError("backoffs must satisfy 0 <= initial_backoff_s <= max_backoff_s")
        if self.multiplier < 1:
            raise ValueError(f"multiplier must be at least 1, got {self.multiplier}")

    def backoff_s(self, retry: int, rng: Callable[[], float] = random.random) -> float:
        """The wait before retry number `retry` (1 = the first retry): full jitter."""
        ceiling = min(self.max_backoff_s, self.initial_backoff_s * self.multiplier ** (retry - 1))
        return ceiling * rng()


class NotSent(Exception):
    """No coordinator could be reached before the deadline: the request never left."""

    def __init__(self, tried: tuple[str, ...]) -> None:
        super().__init__(tried)
        self.tried = tried


def pause_before_retry(policy: RetryPolicy, kind: str, failure: NotSent | ShardsieveError,
                       retry: int, now: float, deadline: float) -> float:
    """The wait before retry number `retry` (1 = the first) of a call of `kind` that failed
    with `failure`; raises the error the caller gets when the call must not be tried again
    (attempts used up, not retryable, or the pause would pass the call's deadline)."""
    if isinstance(failure, NotSent):
        error: ShardsieveError = CoordinatorUnavailable(
            f"cannot reach any coordinator (tried {', '.join(failure.tried) or 'none: deadline passed'})",
            tried=failure.tried, coordinator=failure.tried[-1] if failure.tried else "")
    else:
        error = failure
    if retry >= policy.attempts or not may_retry(kind, error, sent=not isinstance(failure, NotSent)):
        raise error from None
    pause = policy.backoff_s(retry)
    if now + pause >= deadline:
        raise error from None
    return pause


def may_retry(kind: str, error: ShardsieveError, *, sent: bool) -> bool:
    """Whether a call of `kind` (READ, DELETE, WRITE) that failed with `error` may be tried
    again. `sent`: the request left this process (False: the coordinator could not be reached
    at all, so nothing was applied)."""
    if not isinstance(error, Unavailable):
        return False
    if kind in (READ, DELETE):
        return True
    if isinstance(error, CoordinatorUnavailable):
        return not sent
    return error.nothing_applied


@dataclass
class _Rest:
    until: float = 0.0
    failures: int = 0


@dataclass
class CoordinatorPool:
    """The coordinators in order of preference and which of them rest (see module docstring)."""

    addresses: tuple[str, ...]
    rest_s: float = 1.0
    max_rest_s: float = 30.0
    _rests: dict[str, _Rest] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if not self.addresses:
            raise ValueError("give at least one coordinator address")
        if len(set(self.addresses)) != len(self.addresses):
            raise ValueError(f"coordinator addresses repeat: {', '.join(self.addresses)}")
        self._rests = {a: _Rest() for a in self.addresses}

    def order(self, now: float) -> list[str]:
        """Coordinators to try for one call, in order: the ones not resting by preference, then
        the resting ones by the end of their rest."""
        awake = [a for a in self.addresses if self._rests[a].until <= now]
        resting = sorted((a for a in self.addresses if self._rests[a].until > now), key=lambda a: self._rests[a].until)
        return awake + resting

    def failed(self, address: str, now: float) -> None:
        """`address` could not be reached: it rests, longer each time in a row."""
        rest = self._rests[address]
        rest.failures += 1
        rest.until = now + min(self.max_rest_s, self.rest_s * 2 ** (rest.failures - 1))

    def succeeded(self, address: str) -> None:
        rest = self._rests[address]
        rest.failures = 0
        rest.until = 0.0

    def resting(self, now: float) -> list[str]:
        return [a for a in self.addresses if self._rests[a].until > now]
