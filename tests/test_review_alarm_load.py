"""Alarm-load figures on a constructed event list whose every answer can be counted by hand.

The scenario (times after T0 = 2026-01-01T00:00Z, period 50 hours = 300 ten-minute windows):
  - window [0:10, 0:20): 12 Shewhart raises on tags F01..F12, 10 s apart: a flood (more than 10);
  - window [0:30, 0:40): 10 CUSUM raises on F01..F10: exactly 10, not a flood (each F alarm clears after 1 min);
  - tag C: Shewhart raises at 1:00:00, 1:00:20, 1:00:50 (cleared 5 s after each): 3 within 50 s, chattering;
  - tag D: Shewhart raises at 1:10:00, 1:10:30, 1:11:00: 3 within exactly 60 s, not chattering (< 60 s);
  - tag E: Shewhart 1:20:00, CUSUM 1:20:10, EWMA 1:20:20, all cleared 1:30: chattering only when counted per tag;
  - tag S: EWMA raised 0:05, cleared 25:05:01 (25 h: standing); S2: CUSUM raised 1:00, cleared 23:00 (22 h: not);
    S3: Shewhart raised 0:50, never cleared (49.2 h to the end: standing). S and S3 both stand during
    [24:50, 25:05:01], so at most 2 stand at once;
  - tag Q: a data-quality gap notice at 0:15, counted only when quality notices are included.
Raises: 12 + 10 + 3 + 3 + 3 + 3 = 34.
"""

from __future__ import annotations

import json

import pytest

from streamguard.events import Event
from streamguard.review.alarm_load import AlarmLoadSettings, alarm_load
from streamguard.review.event_arrays import EventArrays, alarm_intervals
from streamguard.timeparse import parse_time

T0 = parse_time("2026-01-01T00:00:00Z")
S = 10**9
MIN = 60 * S
H = 60 * MIN


def event(tag: str, detector: str, kind: str, at: int) -> Event:
    return Event(tag=tag, detector=detector, rule=detector, kind=kind, ts_ns=T0 + at, value=0.0, statistic=0.0,
                 limit=1.0, center=0.0, sigma=1.0, subgroup_size=1, direction="up", limits_version="test")


def scenario() -> list[Event]:
    events = []
    for k in range(12):
        events.append(event(f"F{k + 1:02d}", "shewhart", "raise", 10 * MIN + k * 10 * S))
        events.append(event(f"F{k + 1:02d}", "shewhart", "clear", 10 * MIN + k * 10 * S + MIN))
    for k in range(10):
        events.append(event(f"F{k + 1:02d}", "cusum", "raise", 30 * MIN + k * 10 * S))
        events.append(event(f"F{k + 1:02d}", "cusum", "clear", 30 * MIN + k * 10 * S + MIN))
    for at in (0, 20, 50):
        events.append(event("C", "shewhart", "raise", H + at * S))
        events.append(event("C", "shewhart", "clear", H + (at + 5) * S))
    for at in (0, 30, 60):
        events.append(event("D", "shewhart", "raise", H + 10 * MIN + at * S))
        events.append(event("D", "shewhart", "clear", H + 10 * MIN + (at + 5) * S))
    for k, detector in enumerate(("shewhart", "cusum", "ewma")):
        events.append(event("E", detector, "raise", H + 20 * MIN + 10 * k * S))
        events.append(event("E", detector, "clear", H + 30 * MIN))
    events.append(event("S", "ewma", "raise", 5 * MIN))
    events.append(event("S", "ewma", "clear", 25 * H + 5 * MIN + S))
    events.append(event("S2", "cusum", "raise", H))
    events.append(event("S2", "cusum", "clear", 23 * H))
    events.append(event("S3", "shewhart", "raise", 50 * MIN))
    events.append(event("Q", "quality", "gap", 15 * MIN))
    events.sort(key=Event.sort_key)
    return events


@pytest.fixture(scope="module")
def load():
    return alarm_load(EventArrays.of(scenario()), T0, T0 + 50 * H)


def test_rates_are_raises_over_the_period(load) -> None:
    """34 raises over 50 h: 0.68 an hour, 34/300 per 10 minutes, 16.32 a day (quality notice not counted)."""
    assert load.figures["alarms"] == 34
    assert load.figures["alarms_per_hour"] == pytest.approx(34 / 50)
    assert load.figures["alarms_per_10_minutes"] == pytest.approx(34 / 300)
    assert load.figures["alarms_per_day"] == pytest.approx(34 / (50 / 24))
    assert load.window_counts.shape == (300,)
    assert int(load.window_counts.sum()) == 34


def test_floods_are_windows_with_more_than_ten(load) -> None:
    """Window 1 holds 12 (flood), window 3 holds exactly 10 (not a flood: the ISA-18.2 / IEC 62682 metric counts
    10-minute periods with more than 10 alarms; from memory)."""
    assert load.window_counts[1] == 12
    assert load.window_counts[3] == 10
    assert load.figures["peak_10_minutes"] == 12
    assert load.figures["flood_windows"] == 1
    assert load.figures["flood_share_percent"] == pytest.approx(100 / 300)


def test_top_ten_share_counts_the_ten_busiest_tags(load) -> None:
    """C, D, E raise 3 times each, F01..F10 twice: the top ten hold 3 * 3 + 7 * 2 = 23 of 34."""
    assert load.top_tags[:3] == ["C", "D", "E"]
    assert len(load.top_tags) == 10
    assert load.figures["top_share_percent"] == pytest.approx(100 * 23 / 34)


def test_chattering_needs_three_raises_within_less_than_a_minute(load) -> None:
    """Per alarm (tag and detector) only C chatters: D's three span exactly 60 s, E's are three detectors.
    (Three or more raises within a minute is common practice, not a number from a standard.)"""
    assert [(c["tag"], c["detector"], c["raises_in_bursts"]) for c in load.chattering] == [("C", "shewhart", 3)]
    per_tag = alarm_load(EventArrays.of(scenario()), T0, T0 + 50 * H, AlarmLoadSettings(chatter_per="tag"))
    assert sorted(c["tag"] for c in per_tag.chattering) == ["C", "E"]


def test_standing_alarms_are_in_alarm_longer_than_24_hours(load) -> None:
    """S (25 h, cleared) and S3 (never cleared, 49.2 h to the end) stand; S2 (22 h) does not; 2 at once.
    (ISA-18.2 calls an alarm in alarm for more than 24 hours stale; from memory.)"""
    standing = {(r["tag"], r["detector"]): r for r in load.standing}
    assert set(standing) == {("S", "ewma"), ("S3", "shewhart")}
    assert standing[("S", "ewma")]["hours"] == pytest.approx(25 + 1 / 3600)
    assert standing[("S", "ewma")]["cleared"]
    assert standing[("S3", "shewhart")]["hours"] == pytest.approx(50 - 50 / 60)
    assert not standing[("S3", "shewhart")]["cleared"]
    assert load.figures["most_standing_at_once"] == 2


def test_quality_notices_count_only_when_asked() -> None:
    """With quality notices included the gap on Q is the 35th alarm and lands in the flood window."""
    with_quality = alarm_load(EventArrays.of(scenario()), T0, T0 + 50 * H, AlarmLoadSettings(include_quality=True))
    assert with_quality.figures["alarms"] == 35
    assert with_quality.window_counts[1] == 13


def test_verdicts_against_the_benchmarks(load) -> None:
    """0.68 an hour meets ISA-18.2's ~6; 67.6 % from the top ten is above its ~5 %; one chattering source is above
    zero; a peak of 12 is above 10 (ISA-18.2 / IEC 62682 table of performance metrics, values from memory)."""
    verdict = {c["figure"]: c["verdict"] for c in load.checks}
    assert verdict["alarms_per_hour"] == "meets"
    assert verdict["top_share_percent"] == "above"
    assert verdict["chattering_sources"] == "above"
    assert verdict["peak_10_minutes"] == "above"
    assert verdict["most_standing_at_once"] == "meets"
    assert all(c["source"] for c in load.checks)
    json.dumps(load.to_dict())


def test_flood_threshold_is_a_setting() -> None:
    """With a flood at more than 9, windows 1 (12) and 3 (10) both flood."""
    load = alarm_load(EventArrays.of(scenario()), T0, T0 + 50 * H, AlarmLoadSettings(flood_above=9))
    assert load.figures["flood_windows"] == 2


def test_intervals_pair_each_raise_with_its_clear() -> None:
    """Every raise gets the next clear of its tag and detector; only S3 stays open (-1)."""
    intervals = alarm_intervals(EventArrays.of(scenario()))
    names = EventArrays.of(scenario()).tag_names
    open_ones = {(names[int(t)], int(d)) for t, d, e in zip(intervals.tag, intervals.detector, intervals.end,
                                                             strict=True) if e < 0}  # fmt: skip
    assert len(intervals) == 34
    assert open_ones == {("S3", 0)}
    c_rows = [i for i in range(len(intervals)) if names[int(intervals.tag[i])] == "C"]
    assert [(int(intervals.end[i]) - int(intervals.start[i])) // S for i in c_rows] == [5, 5, 5]
