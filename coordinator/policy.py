"""The coordinator's runtime policy: targets, thresholds and limits operators may change live.

A policy is immutable; `updated(values)` parses and validates a whole name -> text mapping and
returns a new policy, or raises PolicyError naming the first bad name or value (so a partly
bad request changes nothing).
"""

from __future__ import annotations

import dataclasses
import math
import threading
from dataclasses import dataclass
from typing import Any, Mapping

MODES = ("safe", "fast")


class PolicyError(ValueError):
    """A policy name or value is not acceptable; the message names it and the accepted range."""


@dataclass(frozen=True)
class Policy:
    target_fpr: float = 0.01
    saturation_ratio: float = 2.0
    growth: float = 2.0
    shrink_below: float = 0.25
    max_concurrent_rebuilds: int = 1
    auto_rebuild: bool = True
    stale_after_s: float = 2.0
    mode: str = "safe"
    min_capacity: int = 1000

    def validate(self) -> None:
        def bad(name: str, why: str) -> PolicyError:
            return PolicyError(f"policy {name.replace('_', '-')}={getattr(self, name)!r}: {why}")

        if not 0.0 < self.target_fpr < 1.0:
            raise bad("target_fpr", "must be strictly between 0 and 1")
        if not (self.saturation_ratio >= 1.0 and math.isfinite(self.saturation_ratio)):
            raise bad("saturation_ratio", "must be a finite number >= 1")
        if not (1.0 < self.growth <= 64.0):
            raise bad("growth", "must be above 1 and at most 64")
        if not 0.0 <= self.shrink_below < 1.0:
            raise bad("shrink_below", "must be within [0, 1)")
        if not 1 <= self.max_concurrent_rebuilds <= 1024:
            # 0 would leave every requested rebuild waiting forever; auto_rebuild=false is the way
            # to stop the monitor's own rebuilds (docs/coordinator.md, "Accounting and saturation")
            raise bad("max_concurrent_rebuilds", "must be between 1 and 1024 (to stop automatic rebuilds set "
                                                 "auto-rebuild=false; operators' rebuilds always need a slot)")
        if not (0.0 < self.stale_after_s <= 3600.0):
            raise bad("stale_after_s", "must be above 0 and at most 3600 seconds")
        if self.mode not in MODES:
            raise bad("mode", f"must be one of {', '.join(MODES)}")
        if not 1 <= self.min_capacity <= 1 << 36:
            raise bad("min_capacity", "must be between 1 and 2^36 keys")

    def updated(self, values: Mapping[str, str]) -> Policy:
        """A new policy with the named values parsed from text; all or nothing."""
        fields = {f.name: f for f in dataclasses.fields(self)}
        changes: dict[str, Any] = {}
        for raw_name, raw_value in values.items():
            name = raw_name.strip().replace("-", "_")
            if name not in fields:
                known = ", ".join(n.replace("_", "-") for n in fields)
                raise PolicyError(f"unknown policy name {raw_name!r} (known: {known})")
            changes[name] = _parse(raw_name, str(raw_value), fields[name].type)
        policy = dataclasses.replace(self, **changes)
        policy.validate()
        return policy

    def as_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


class LivePolicy:
    """The policy in force. Readers take `current` once per decision (a whole immutable policy,
    swapped in one assignment); `update` runs under the coordinator's lock, so two operators
    changing different names at once both get their change."""

    def __init__(self, policy: Policy, lock: threading.RLock) -> None:
        policy.validate()
        self._policy = policy
        self._lock = lock

    @property
    def current(self) -> Policy:
        return self._policy

    def update(self, values: Mapping[str, str]) -> Policy:
        """Apply the named values (all or nothing; PolicyError names the first bad one)."""
        with self._lock:
            self._policy = self._policy.updated(values)
            return self._policy


def _parse(name: str, text: str, tp: Any) -> Any:
    tname = tp if isinstance(tp, str) else getattr(tp, "__name__", str(tp))
    value = text.strip()
    try:
        if tname == "bool":
            low = value.lower()
            if low in ("1", "true", "yes", "on"):
                return True
            if low in ("0", "false", "no", "off"):
                return False
            raise ValueError
        if tname == "int":
            return int(value)
        if tname == "float":
            result = float(value)
            if math.isnan(result):
                raise ValueError
            return result
        return value
    except ValueError:
        raise PolicyError(f"policy {name}={text!r} is not a valid {tname}") from None
