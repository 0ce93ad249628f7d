"""Events: the records that leave the pipeline, process alarms and data-quality notices alike.

Every event explains itself (tag, detector, rule, kind, time, value, statistic, limit, centre, sigma,
direction, limits version), and its id is a hash of what it is, not of when it was computed: a replay
run twice, or a live service republishing after a restart, gives the same ids, so consumers can
de-duplicate.
"""

from __future__ import annotations

import hashlib
import math
from typing import Any, NamedTuple

from .timeparse import format_time

DETECTOR_ORDER = {"quality": 0, "shewhart": 1, "cusum": 2, "ewma": 3, "spread": 4, "pair": 5}
KIND_ORDER = {"gap": 0, "range_end": 1, "stale_end": 2, "range": 3, "stale": 4, "raise": 5, "clear": 6}


def event_id(tag: str, detector: str, rule: str, kind: str, ts_ns: int) -> str:
    text = f"{tag}\x1f{detector}\x1f{rule}\x1f{kind}\x1f{ts_ns}"
    return hashlib.sha256(text.encode()).hexdigest()[:24]


def _number(x: float) -> float | None:
    return None if x is None or not math.isfinite(x) else float(x)


class Event(NamedTuple):
    """One event: immutable, and a tuple because a noisy replay makes hundreds of thousands of them
    (a tuple is about 3x cheaper to create than a frozen dataclass)."""

    tag: str
    detector: str  # shewhart, cusum, ewma, spread, or "quality" for data-quality events
    rule: str
    kind: str  # raise, clear, or a data-quality kind: gap, stale, stale_end, range, range_end
    ts_ns: int
    value: float
    statistic: float
    limit: float
    center: float | None
    sigma: float | None
    subgroup_size: int
    direction: str  # up, down, none
    limits_version: str
    units: str | None = None
    note: str | None = None

    @property
    def id(self) -> str:
        return event_id(self.tag, self.detector, self.rule, self.kind, self.ts_ns)

    def sort_key(self) -> tuple[int, str, int, int, str]:
        return (self.ts_ns, self.tag, DETECTOR_ORDER.get(self.detector, 9), KIND_ORDER.get(self.kind, 9), self.rule)

    def to_dict(self) -> dict[str, Any]:
        return {
            "id": self.id,
            "tag": self.tag,
            "detector": self.detector,
            "rule": self.rule,
            "kind": self.kind,
            "ts": format_time(self.ts_ns),
            "value": _number(self.value),
            "statistic": _number(self.statistic),
            "limit": _number(self.limit),
            "center": _number(self.center) if self.center is not None else None,
            "sigma": _number(self.sigma) if self.sigma is not None else None,
            "subgroup_size": self.subgroup_size,
            "direction": self.direction,
            "limits_version": self.limits_version,
            "units": self.units,
            "note": self.note,
        }


DIRECTIONS = {1: "up", -1: "down", 0: "none"}
