"""Alarm-load figures of a replay, set beside the published alarm-management benchmarks.

An alarm owner judges a detector by the load it puts on the operator: how many alarms an hour and per
ten minutes, how bad the worst ten minutes get, how often the board floods, whether a few tags make
most of the noise, whether alarms chatter or stand for days. The benchmarks are those of ANSI/ISA-18.2
and IEC 62682 (their table of alarm-system performance metrics) and EEMUA Publication 191; every one
is a default a site may change (``AlarmLoadSettings``), and every figure names its source.

Counting: an alarm is a process raise (Shewhart, CUSUM, EWMA or spread); data-quality notices are
counted only when ``include_quality`` is set. Ten-minute windows are aligned to the clock (UTC) and
cover the replayed period from the first to the last sample; the whole tag set is one operating
position unless ``operating_positions`` says otherwise.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .event_arrays import DETECTORS, AlarmIntervals, EventArrays, alarm_intervals

MINUTE_NS = 60 * 10**9
HOUR_NS = 60 * MINUTE_NS
DAY_NS = 24 * HOUR_NS
WINDOW_NS = 10 * MINUTE_NS  # ISA-18.2, IEC 62682 and EEMUA 191 all count alarms in 10-minute periods

# The benchmarks' sources. The tables themselves could not be consulted while writing this: the values
# below are from memory, as widely quoted; a site should check them against the edition it follows.
SOURCES = {
    "ISA-18.2 / IEC 62682": "ANSI/ISA-18.2-2016 (Management of Alarm Systems for the Process Industries) and "
                            "IEC 62682:2014, table of alarm-system performance metrics based on at least 30 days "
                            "of data; most values there are approximate ('~'); from memory",
    "ISA-18.2-2009": "ANSI/ISA-18.2-2009, the first edition of the same table; from memory",
    "EEMUA 191": "EEMUA Publication 191, Alarm Systems: a guide to design, management and procurement, 3rd "
                 "edition (2013), alarm-rate benchmarks; from memory",
    "common practice": "common practice in alarm-management reviews, not a number from a standard",
}  # fmt: skip


@dataclass(frozen=True)
class Benchmark:
    """A published target: at most ``acceptable`` is fine; up to ``manageable`` (if given) is tolerable."""

    figure: str  # key into the computed figures
    label: str
    acceptable: float
    manageable: float | None
    sources: tuple[str, ...]  # keys of SOURCES
    note: str = ""
    unit: str = ""
    wording: str = ""  # the target as the source words it, where that differs from the numbers

    def verdict(self, value: float) -> str:
        if value <= self.acceptable:
            return "meets"
        if self.manageable is not None and value <= self.manageable:
            return "manageable"
        return "above"

    def describe(self) -> str:
        if self.wording:
            return self.wording
        unit = f" {self.unit}" if self.unit else ""
        if self.manageable is None:
            return "none" if self.acceptable == 0 else f"at most {self.acceptable:g}{unit}"
        return f"~{self.acceptable:g}{unit} acceptable, ~{self.manageable:g}{unit} manageable"

    @property
    def source(self) -> str:
        return " + ".join(self.sources) + (f" ({self.note})" if self.note else "")


_ISA = "ISA-18.2 / IEC 62682"
DEFAULT_BENCHMARKS: tuple[Benchmark, ...] = (
    Benchmark("alarms_per_day", "Average alarms per day", 144, 288, (_ISA, "ISA-18.2-2009"),
              "150 and 300 in the 2009 edition"),  # fmt: skip
    Benchmark("alarms_per_hour", "Average alarms per hour", 6, 12, (_ISA,)),
    Benchmark("alarms_per_10_minutes", "Average alarms per 10 minutes", 1, 2, (_ISA, "EEMUA 191")),
    Benchmark("peak_10_minutes", "Most alarms in one 10-minute window", 10, None, (_ISA, "EEMUA 191"),
              "EEMUA 191: up to 10 in the 10 minutes after a major upset should be manageable"),  # fmt: skip
    Benchmark("flood_share_percent", "10-minute windows in flood", 1, None, (_ISA,), unit="%",
              wording="~1 % or less"),  # fmt: skip
    Benchmark("top_share_percent", "Share of alarms from the most frequent tags", 1, 5, (_ISA,), unit="%",
              note="ISA-18.2 counts the ten most frequent alarms; here tags"),  # fmt: skip
    Benchmark("chattering_sources", "Chattering alarm sources", 0, None, (_ISA, "common practice"),
              "the count of raises within a minute that makes an alarm chattering is common practice"),  # fmt: skip
    Benchmark("most_standing_at_once", "Most standing alarms at one time", 4, None,
              (_ISA,), "stale alarms", wording="fewer than 5 on any day"),  # fmt: skip
)


@dataclass(frozen=True)
class AlarmLoadSettings:
    """The definitions behind the figures; defaults as in the sources named beside each."""

    flood_above: int = 10  # a window is in flood with more than this many alarms (ISA-18.2: 10 in 10 min)
    chatter_raises: int = 3  # common practice: 3 or more raises ...
    chatter_window_ns: int = MINUTE_NS  # ... within one minute
    chatter_per: str = "alarm"  # "alarm": per tag and detector; "tag": all detectors of a tag together
    standing_ns: int = DAY_NS  # ISA-18.2 "stale": in alarm for longer than 24 hours
    top_tags: int = 10  # ISA-18.2: the ten most frequent alarms
    operating_positions: int = 1
    include_quality: bool = False
    benchmarks: tuple[Benchmark, ...] = DEFAULT_BENCHMARKS


@dataclass
class AlarmLoad:
    """The figures, with the per-window counts kept for the pictures (never downsampled here)."""

    settings: AlarmLoadSettings
    start_ns: int
    end_ns: int
    window_start_ns: int
    window_counts: np.ndarray  # alarms per clock-aligned window over the period
    figures: dict[str, float]
    raises_by_tag: dict[str, dict[str, int]]  # tag -> detector -> raises (most frequent first)
    top_tags: list[str]
    chattering: list[dict[str, Any]]
    standing: list[dict[str, Any]]
    checks: list[dict[str, Any]] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        from ..timeparse import format_time

        s = self.settings
        return {
            "definitions": {
                "alarms": "process raises" + (" and data-quality notices" if s.include_quality else ""),
                "window_minutes": WINDOW_NS / MINUTE_NS,
                "flood": f"more than {s.flood_above} alarms in one window",
                "chattering": f"{s.chatter_raises} or more raises of one "
                              f"{'tag and detector' if s.chatter_per == 'alarm' else 'tag'} within "
                              f"{s.chatter_window_ns / 1e9:g} s (common practice)",
                "standing_hours": s.standing_ns / HOUR_NS,
                "top_tags": s.top_tags,
                "operating_positions": s.operating_positions,
            },  # fmt: skip
            "period": {"start": format_time(self.start_ns), "end": format_time(self.end_ns),
                       "hours": (self.end_ns - self.start_ns) / HOUR_NS},  # fmt: skip
            "figures": self.figures,
            "checks": self.checks,
            "top_tags": [{"tag": t, "raises": sum(self.raises_by_tag[t].values())} for t in self.top_tags],
            "chattering": self.chattering,
            "standing": self.standing,
        }


def _chattering(times_by_source: dict[tuple[str, str], np.ndarray], raises: int,
                window_ns: int) -> list[dict[str, Any]]:  # fmt: skip
    """Sources where some ``raises`` consecutive raises span less than ``window_ns``."""
    from ..timeparse import format_time

    found: list[dict[str, Any]] = []
    for (tag, detector), times in times_by_source.items():
        if times.shape[0] < raises:
            continue
        span = times[raises - 1:] - times[: times.shape[0] - raises + 1]
        bursts = np.flatnonzero(span < window_ns)
        if bursts.shape[0]:
            in_burst = np.zeros(times.shape[0], np.bool_)
            for offset in range(raises):
                in_burst[bursts + offset] = True
            found.append({"tag": tag, "detector": detector, "raises_in_bursts": int(in_burst.sum()),
                          "raises": int(times.shape[0]),
                          "first_burst": format_time(int(times[bursts[0]]))})  # fmt: skip
    found.sort(key=lambda row: (-int(row["raises_in_bursts"]), str(row["tag"]), str(row["detector"])))
    return found


def _standing(intervals: AlarmIntervals, names: list[str], end_ns: int,
              standing_ns: int) -> tuple[list[dict[str, Any]], int]:  # fmt: skip
    """Alarms in alarm longer than ``standing_ns``, and the most of them standing at one moment."""
    from ..timeparse import format_time

    stop = intervals.end_or(end_ns)
    long = np.flatnonzero(stop - intervals.start > standing_ns)
    rows = [{
        "tag": names[int(intervals.tag[i])], "detector": DETECTORS[int(intervals.detector[i])],
        "raised": format_time(int(intervals.start[i])), "hours": (int(stop[i]) - int(intervals.start[i])) / HOUR_NS,
        "cleared": bool(intervals.end[i] >= 0),
    } for i in long]  # fmt: skip
    if not rows:
        return rows, 0
    # An alarm counts as standing from raise + standing time until it clears.
    moments = np.concatenate([intervals.start[long] + standing_ns, stop[long]])
    steps = np.concatenate([np.ones(long.shape[0], np.int64), -np.ones(long.shape[0], np.int64)])
    order = np.lexsort((steps, moments))  # a clear at the same moment counts before a new one
    return rows, int(np.cumsum(steps[order]).max())


def alarm_load(events: EventArrays, start_ns: int, end_ns: int,
               settings: AlarmLoadSettings | None = None) -> AlarmLoad:  # fmt: skip
    """Every figure of the alarm-load section, computed on all events (no sampling)."""
    s = settings or AlarmLoadSettings()
    if s.chatter_per not in ("alarm", "tag"):
        raise ValueError(f"chatter_per: 'alarm' or 'tag', got {s.chatter_per!r}")
    end_ns = max(end_ns, start_ns + 1)
    chosen = events.select(events.openings(s.include_quality))
    ts = chosen.ts
    total = int(ts.shape[0])
    hours = (end_ns - start_ns) / HOUR_NS
    positions = max(s.operating_positions, 1)

    window_start = (start_ns // WINDOW_NS) * WINDOW_NS
    n_windows = int((end_ns - 1 - window_start) // WINDOW_NS) + 1
    slot = np.clip((ts - window_start) // WINDOW_NS, 0, n_windows - 1)
    counts = np.bincount(slot, minlength=n_windows).astype(np.int64)

    # Raises per tag and detector, most frequent tag first.
    names = events.tag_names
    pair = chosen.tag.astype(np.int64) * len(DETECTORS) + chosen.detector
    pair_counts = np.bincount(pair, minlength=len(names) * len(DETECTORS)).reshape(len(names), len(DETECTORS))
    per_tag = pair_counts.sum(axis=1)
    ranked = [int(t) for t in np.lexsort((np.array(names, dtype=object).astype(str), -per_tag)) if per_tag[t] > 0]
    raises_by_tag = {names[t]: {DETECTORS[d]: int(pair_counts[t, d]) for d in range(len(DETECTORS))
                                if pair_counts[t, d]} for t in ranked}  # fmt: skip
    top = ranked[: s.top_tags]
    top_share = 100.0 * float(per_tag[top].sum()) / total if total else 0.0

    times_by_source: dict[tuple[str, str], np.ndarray] = {}
    if total:
        key = pair if s.chatter_per == "alarm" else chosen.tag.astype(np.int64) * len(DETECTORS)
        order = np.lexsort((ts, key))
        keys, first = np.unique(key[order], return_index=True)
        bounds = [*first[1:], order.shape[0]]
        for k, lo, hi in zip(keys, first, bounds, strict=True):
            tag = names[int(k) // len(DETECTORS)]
            detector = DETECTORS[int(k) % len(DETECTORS)] if s.chatter_per == "alarm" else "all"
            times_by_source[(tag, detector)] = ts[order[lo:hi]]
    chattering = _chattering(times_by_source, s.chatter_raises, s.chatter_window_ns)

    intervals = alarm_intervals(events, s.include_quality)
    standing, most_standing = _standing(intervals, names, end_ns, s.standing_ns)

    figures: dict[str, float] = {
        "alarms": float(total),
        "alarms_per_day": total / (hours / 24) / positions,
        "alarms_per_hour": total / hours / positions,
        "alarms_per_10_minutes": total / (hours * 6) / positions,
        "peak_10_minutes": float(counts.max()) / positions,
        "windows": float(n_windows),
        "flood_windows": float(int((counts > s.flood_above).sum())),
        "flood_share_percent": 100.0 * float((counts > s.flood_above).sum()) / n_windows,
        "top_share_percent": top_share,
        "top_tags": float(len(top)),
        "chattering_sources": float(len(chattering)),
        "standing_alarms": float(len(standing)),
        "most_standing_at_once": float(most_standing),
    }
    load = AlarmLoad(s, start_ns, end_ns, window_start, counts, figures, raises_by_tag,
                     [names[t] for t in top], chattering, standing)  # fmt: skip
    for benchmark in s.benchmarks:
        value = figures[benchmark.figure]
        load.checks.append({
            "figure": benchmark.figure, "label": benchmark.label, "value": value,
            "target": benchmark.describe(), "verdict": benchmark.verdict(value), "source": benchmark.source,
            "sources": [SOURCES.get(key, key) for key in benchmark.sources],
        })  # fmt: skip
    return load


def format_alarm_load(load: AlarmLoad) -> list[str]:
    """The lines printed after the replay summary: each figure, its target and where the target is from."""
    mark = {"meets": "ok", "manageable": "manageable", "above": "ABOVE"}
    positions = load.settings.operating_positions
    who = "one operating position" if positions == 1 else f"{positions} operating positions"
    hours = (load.end_ns - load.start_ns) / HOUR_NS
    lines = [f"alarm load ({int(load.figures['alarms']):,} alarms over {hours:.1f} h, {who}):"]
    for check in load.checks:
        value = check["value"]
        text = f"{value:,.0f}" if value == int(value) else f"{value:,.2f}"
        lines.append(f"  {check['label']:<62} {text:>10}  {mark[check['verdict']]:<10} target {check['target']}")
    return lines
