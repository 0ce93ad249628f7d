"""Good, finite samples of a few named tags out of historian files, and time windows over them.

The comparison commands read files the way replay does (``sources.historian``), but keep only
the tags asked for; samples whose quality is not GOOD or whose value is not finite are counted
and left out, because a comparison of means has no use for a value the instrument disowned.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from ..timeparse import format_time
from ..types import GOOD


@dataclass(frozen=True)
class TagSeries:
    """One tag's good samples sorted by time, with what was left out on the way."""

    tag: str
    ts: np.ndarray  # int64 ns UTC, ascending
    value: np.ndarray  # float64
    not_good_ts: np.ndarray  # times of rows with quality uncertain or bad, ascending
    not_finite_ts: np.ndarray  # times of good-quality rows whose value is NaN or infinite, ascending


@dataclass(frozen=True)
class Window:
    """A half-open time window [start, end); None is unbounded on that side."""

    start: int | None = None
    end: int | None = None

    def describe(self) -> str:
        start = format_time(self.start) if self.start is not None else "start of data"
        end = format_time(self.end) if self.end is not None else "end of data"
        return f"{start} .. {end}"

    def to_dict(self) -> dict[str, Any]:
        return {
            "start": format_time(self.start) if self.start is not None else None,
            "end": format_time(self.end) if self.end is not None else None,
        }


def read_tag_series(
    paths: Sequence[str | Path], tags: Sequence[str], settings: Any = None
) -> tuple[dict[str, TagSeries], Any]:
    """Read the files once and return each asked-for tag's series, plus the reader's problem counts."""
    from ..sources.historian import InputSettings, ReadProblems, read_historian

    wanted = list(dict.fromkeys(tags))
    parts: dict[str, list[tuple[np.ndarray, np.ndarray]]] = {tag: [] for tag in wanted}
    rows = dict.fromkeys(wanted, 0)
    not_good: dict[str, list[np.ndarray]] = {tag: [] for tag in wanted}
    not_finite: dict[str, list[np.ndarray]] = {tag: [] for tag in wanted}
    problems = ReadProblems()
    chunks = read_historian(
        [str(path) for path in paths], settings if settings is not None else InputSettings(), strict=False,
        problems=problems,
    )  # fmt: skip
    for chunk in chunks:
        names = list(chunk.names)
        for tag in wanted:
            if tag not in names:
                continue
            code = names.index(tag)
            mine = np.asarray(chunk.codes) == code
            count = int(np.count_nonzero(mine))
            if count == 0:
                continue
            quality = np.asarray(chunk.quality)[mine]
            value = np.asarray(chunk.value, dtype=np.float64)[mine]
            ts = np.asarray(chunk.ts, dtype=np.int64)[mine]
            good = quality == GOOD
            finite = np.isfinite(value)
            rows[tag] += count
            not_good[tag].append(ts[~good])
            not_finite[tag].append(ts[good & ~finite])
            keep = good & finite
            parts[tag].append((ts[keep], value[keep]))
    series = {}
    for tag in wanted:
        if rows[tag] == 0:
            raise InputError(f"tag {tag!r} does not occur in {', '.join(str(p) for p in paths)}")
        ts = np.concatenate([p[0] for p in parts[tag]])
        value = np.concatenate([p[1] for p in parts[tag]])
        order = np.argsort(ts, kind="stable")
        series[tag] = TagSeries(
            tag,
            ts[order],
            value[order],
            np.sort(np.concatenate(not_good[tag])),
            np.sort(np.concatenate(not_finite[tag])),
        )
    return series, problems


def _span(ts: np.ndarray, window: Window) -> slice:
    low = 0 if window.start is None else int(np.searchsorted(ts, window.start, side="left"))
    high = ts.shape[0] if window.end is None else int(np.searchsorted(ts, window.end, side="left"))
    return slice(low, high)


def in_window(series: TagSeries, window: Window) -> tuple[np.ndarray, np.ndarray]:
    """The good samples with start <= ts < end."""
    span = _span(series.ts, window)
    return series.ts[span], series.value[span]


def excluded_in_window(series: TagSeries, window: Window) -> tuple[int, int]:
    """How many rows in the window were left out: (quality not good, value not finite)."""
    not_good = series.not_good_ts[_span(series.not_good_ts, window)]
    not_finite = series.not_finite_ts[_span(series.not_finite_ts, window)]
    return int(not_good.shape[0]), int(not_finite.shape[0])


def median_interval_s(ts: np.ndarray) -> float | None:
    """The typical sampling interval in seconds; converts a required sample count into time."""
    if ts.shape[0] < 2:
        return None
    steps = np.diff(ts)
    steps = steps[steps > 0]
    return float(np.median(steps)) / 1e9 if steps.shape[0] else None
