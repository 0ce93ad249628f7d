"""A replay's events as columns, and the alarm intervals (raise to clear) they imply.

The review counts, windows and pairs tens of thousands of events; doing that on numpy columns rather
than on ``Event`` objects keeps a month of 500 tags to a fraction of a second. Only the fields the
review needs are kept: time, tag, detector, kind, charted value and direction.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from ..events import DETECTOR_ORDER, Event

# Detector codes: every detector the events module orders (the pipeline's order), the quality gate last,
# so a detector added there is counted here without a change.
DETECTORS = (*sorted((d for d in DETECTOR_ORDER if d != "quality"), key=DETECTOR_ORDER.__getitem__), "quality")
QUALITY = DETECTORS.index("quality")
# Event kinds: a process alarm raises and clears; the quality gate's notices open (gap is a single notice).
KINDS = ("raise", "clear", "gap", "stale", "stale_end", "range", "range_end")
RAISE, CLEAR = 0, 1
QUALITY_OPENINGS = (KINDS.index("gap"), KINDS.index("stale"), KINDS.index("range"))
QUALITY_CLOSINGS = {KINDS.index("stale"): KINDS.index("stale_end"), KINDS.index("range"): KINDS.index("range_end")}


@dataclass(frozen=True)
class EventArrays:
    """One row per event, in the replay's order (time, then tag, detector, kind)."""

    tag_names: list[str]
    ts: np.ndarray  # int64 ns
    tag: np.ndarray  # int32 index into tag_names
    detector: np.ndarray  # int8 index into DETECTORS
    kind: np.ndarray  # int8 index into KINDS
    value: np.ndarray  # float64: the charted value (subgroup mean) or the sample for quality notices
    direction: np.ndarray  # int8: +1 up, -1 down, 0 none

    def __len__(self) -> int:
        return int(self.ts.shape[0])

    @classmethod
    def of(cls, events: Sequence[Event], tag_names: Sequence[str] | None = None) -> EventArrays:
        names: list[str] = list(tag_names) if tag_names is not None else []
        index = {name: i for i, name in enumerate(names)}
        n = len(events)
        ts = np.empty(n, np.int64)
        tag = np.empty(n, np.int32)
        detector = np.empty(n, np.int8)
        kind = np.empty(n, np.int8)
        value = np.empty(n, np.float64)
        direction = np.empty(n, np.int8)
        detector_code = {name: i for i, name in enumerate(DETECTORS)}
        kind_code = {name: i for i, name in enumerate(KINDS)}
        direction_code = {"up": 1, "down": -1, "none": 0}
        for i, event in enumerate(events):
            if event.detector not in detector_code:
                raise ValueError(f"event from detector {event.detector!r}, which events.DETECTOR_ORDER does not list")
            t = index.get(event.tag)
            if t is None:
                t = index[event.tag] = len(names)
                names.append(event.tag)
            ts[i] = event.ts_ns
            tag[i] = t
            detector[i] = detector_code[event.detector]
            kind[i] = kind_code[event.kind]
            value[i] = event.value
            direction[i] = direction_code.get(event.direction, 0)
        return cls(names, ts, tag, detector, kind, value, direction)

    def select(self, mask: np.ndarray) -> EventArrays:
        return EventArrays(self.tag_names, self.ts[mask], self.tag[mask], self.detector[mask], self.kind[mask],
                           self.value[mask], self.direction[mask])  # fmt: skip

    def openings(self, include_quality: bool = False) -> np.ndarray:
        """Mask of the events that announce something: process raises, and optionally quality notices."""
        mask = (self.kind == RAISE) & (self.detector != QUALITY)
        if include_quality:
            mask |= (self.detector == QUALITY) & np.isin(self.kind, QUALITY_OPENINGS)
        return mask


@dataclass(frozen=True)
class AlarmIntervals:
    """Each raise paired with the clear that ended it; ``end`` is -1 where the alarm never cleared."""

    tag: np.ndarray
    detector: np.ndarray
    start: np.ndarray  # ns
    end: np.ndarray  # ns, or -1: still standing at the end of the data
    direction: np.ndarray

    def __len__(self) -> int:
        return int(self.start.shape[0])

    def end_or(self, data_end: int) -> np.ndarray:
        return np.where(self.end >= 0, self.end, np.maximum(data_end, self.start))


def alarm_intervals(events: EventArrays, include_quality: bool = False) -> AlarmIntervals:
    """Pair every raise with the next event of its (tag, detector) if that event closes it.

    Raise and clear strictly alternate per (tag, detector) in the pipeline's output, so after a stable
    sort by (tag, detector, time) a raise's partner is simply the next row. Quality stale and range
    notices pair with their ``_end`` notice the same way; a gap is a moment, not an interval.
    """
    if include_quality:
        is_process = events.detector != QUALITY
        is_quality_interval = (events.detector == QUALITY) & (events.kind != KINDS.index("gap"))
        keep = is_process | is_quality_interval
    else:
        keep = events.detector != QUALITY
    rows = np.flatnonzero(keep)
    # Quality kinds: stale/range and their ends are separate series (a range may open while stale).
    series = events.detector[rows].astype(np.int32) * 16
    kinds = events.kind[rows]
    for opening, closing in QUALITY_CLOSINGS.items():
        series = np.where(np.isin(kinds, (opening, closing)), series + opening, series)
    order = np.lexsort((events.ts[rows], series, events.tag[rows]))
    rows = rows[order]
    series = series[order]
    kinds = events.kind[rows]
    opening_kinds = np.array([RAISE, *QUALITY_CLOSINGS])
    closing_of = np.full(len(KINDS), -1, np.int8)
    closing_of[RAISE] = CLEAR
    for opening, closing in QUALITY_CLOSINGS.items():
        closing_of[opening] = closing
    is_open = np.isin(kinds, opening_kinds)
    starts = np.flatnonzero(is_open)
    following = starts + 1
    has_next = following < rows.shape[0]
    end = np.full(starts.shape[0], -1, np.int64)
    nxt = following[has_next]
    same = (events.tag[rows[nxt]] == events.tag[rows[starts[has_next]]]) & (series[nxt] == series[starts[has_next]])
    closes = same & (kinds[nxt] == closing_of[kinds[starts[has_next]]])
    end_part = np.where(closes, events.ts[rows[nxt]], -1)
    end[has_next] = end_part
    first = rows[starts]
    return AlarmIntervals(events.tag[first], events.detector[first], events.ts[first], end, events.direction[first])
