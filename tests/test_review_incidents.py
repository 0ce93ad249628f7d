"""Incidents: the CSV contract, and detection, delay and false alarms on a constructed event list.

Constructed scenario (times after T0 = 2026-01-01T00:00Z; tag A sampled every 10 s from T0):
  - incident A "step" from 1:00:00 to 2:00:00; CUSUM raises on A at 1:03:00 (inside: delay 3 min, and the
    samples from 1:00:00 through 1:03:00 are 19), EWMA at 2:00:00 (the end is included: delay 60 min);
    Shewhart raises on A only at 0:30:00, before the incident: a false alarm, and the incident is missed by it;
  - incident B "open" from 3:00:00 with no end (to the end of the data at 10:00); Shewhart raises on B at 9:00;
  - tag C has no incident: its two CUSUM raises are false alarms; its stale notice is the quality gate's;
  - incident Z names a tag that is not in the data.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from streamguard.errors import InputError
from streamguard.events import Event
from streamguard.review.event_arrays import EventArrays
from streamguard.review.incidents import Incident, read_incidents, score_incidents
from streamguard.timeparse import parse_time

T0 = parse_time("2026-01-01T00:00:00Z")
S = 10**9
MIN = 60 * S
H = 60 * MIN


def event(tag: str, detector: str, kind: str, at: int) -> Event:
    return Event(tag=tag, detector=detector, rule=detector, kind=kind, ts_ns=T0 + at, value=0.0, statistic=0.0,
                 limit=1.0, center=0.0, sigma=1.0, subgroup_size=1, direction="up", limits_version="test")


def events() -> EventArrays:
    found = [
        event("A", "shewhart", "raise", 30 * MIN),
        event("A", "shewhart", "clear", 35 * MIN),
        event("A", "cusum", "raise", H + 3 * MIN),
        event("A", "ewma", "raise", 2 * H),
        event("B", "shewhart", "raise", 9 * H),
        event("C", "cusum", "raise", 4 * H),
        event("C", "cusum", "clear", 4 * H + 5 * MIN),
        event("C", "cusum", "raise", 5 * H),
        event("C", "quality", "stale", 6 * H),
    ]
    found.sort(key=Event.sort_key)
    return EventArrays.of(found)


def incidents() -> list[Incident]:
    return [
        Incident("A", T0 + H, T0 + 2 * H, "step", 2),
        Incident("B", T0 + 3 * H, None, "open", 3),
        Incident("Z", T0, T0 + H, "elsewhere", 4),
    ]


@pytest.fixture(scope="module")
def scores():
    sample_times = {"A": T0 + np.arange(0, 10 * H, 10 * S, dtype=np.int64)}
    monitored = {"A": True, "B": True, "C": True}
    return score_incidents(events(), incidents(), ["shewhart", "cusum", "ewma"], T0 + 10 * H,
                           sample_times=sample_times, monitored=monitored)  # fmt: skip


def test_delay_from_onset_to_first_raise_in_time_and_samples(scores) -> None:
    step = scores.scores[0]
    assert step["cusum"].detected and step["cusum"].delay_ns == 3 * MIN
    assert step["cusum"].delay_samples == 19  # 1:00:00, 1:00:10, ..., 1:03:00
    assert step["ewma"].detected and step["ewma"].delay_ns == H  # the window's end is included
    assert not step["shewhart"].detected  # its only raise came before the onset
    assert not step["quality"].detected


def test_open_incident_lasts_to_the_end_of_the_data(scores) -> None:
    assert scores.scores[1]["shewhart"].delay_ns == 6 * H
    assert scores.scores[1]["shewhart"].delay_samples is None  # no sample times given for B


def test_earliest_process_detection(scores) -> None:
    best = scores.detected_by_any(0)
    assert best is not None and best.delay_ns == 3 * MIN


def test_false_alarms_are_raises_outside_every_incident(scores) -> None:
    """A's Shewhart raise at 0:30 and C's two CUSUM raises; the stale notice counts for the quality gate."""
    assert scores.false_alarms["shewhart"] == 1
    assert scores.false_alarms["cusum"] == 2
    assert scores.false_alarms["ewma"] == 0
    assert scores.false_alarms["quality"] == 1
    assert scores.false_alarms_by_tag == {"A": {"shewhart": 1}, "C": {"cusum": 2, "quality": 1}}


def test_tag_not_in_data_is_named(scores) -> None:
    assert scores.status == ["scored", "scored", "tag not in data"]
    summary = scores.to_dict()
    assert summary["by_detector"]["cusum"] == {"detected": 1, "incidents": 2, "median_delay_s": 180.0,
                                               "false_alarms": 2}  # fmt: skip


def test_reads_the_csv_with_open_end_and_bom(tmp_path: Path) -> None:
    path = tmp_path / "incidents.csv"
    path.write_text("\ufefftag,start,end,label\nFT-1,2026-03-03T20:00:00Z,2026-03-04T04:00:00Z,step\n"
                    "LT-2,2026-03-02T00:00:00+01:00,,drift\n\n", encoding="utf-8")  # fmt: skip
    found = read_incidents(path)
    assert [(i.tag, i.label, i.end_ns is None) for i in found] == [("FT-1", "step", False), ("LT-2", "drift", True)]
    assert found[1].start_ns == parse_time("2026-03-01T23:00:00Z")


@pytest.mark.parametrize(("text", "message"), [
    ("tag,start,end,label\nFT-1,yesterday,,x\n", "incidents.csv:2: start:"),
    ("tag,start,end,label\nFT-1,2026-03-04T00:00:00Z,2026-03-03T00:00:00Z,x\n", "incidents.csv:2: end"),
    ("name,start\nFT-1,2026-03-04T00:00:00Z\n", "incidents.csv:1: no 'tag' column"),
    ("tag,start\n,2026-03-04T00:00:00Z\n", "incidents.csv:2: empty tag"),
    ("", "empty"),
])  # fmt: skip
def test_mistakes_name_file_and_line(tmp_path: Path, text: str, message: str) -> None:
    path = tmp_path / "incidents.csv"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(InputError, match=message):
        read_incidents(path)
