"""Known incidents and how each detector did on them: detected or missed, how late, and false alarms.

The incidents file is what the site knows happened: a CSV with the columns ``tag, start, end, label``
(``end`` may be empty: the incident lasts to the end of the data). An incident counts as detected by a
detector when that detector raises on the incident's tag between its start and end, both included;
the delay runs from the start to the first such raise, in time and in the tag's samples (all samples
the historian holds for the tag from the start up to and including the raise's time). Raises outside
every incident window of their tag are false alarms by this definition, so detectors can be compared
on the same history. The quality gate is scored alongside as the detector ``quality``: its gap, stale
and range notices are what catches a sick instrument.
"""

from __future__ import annotations

import csv
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..durations import format_duration
from ..errors import InputError
from ..timeparse import format_time, parse_time
from .event_arrays import DETECTORS, EventArrays

COLUMNS = ("tag", "start", "end", "label")


@dataclass(frozen=True)
class Incident:
    tag: str
    start_ns: int
    end_ns: int | None  # None: open to the end of the data
    label: str
    line: int  # in the incidents file, for messages

    def window(self, data_end_ns: int) -> tuple[int, int]:
        return self.start_ns, self.end_ns if self.end_ns is not None else max(data_end_ns, self.start_ns)


def read_incidents(path: str | Path) -> list[Incident]:
    """Parse the incidents CSV; every mistake is an InputError naming file:line and column."""
    where = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise InputError(f"{where}: cannot read incidents file ({exc.strerror or exc})") from None
    reader = csv.reader(text.splitlines())
    header = next(reader, None)
    if header is None:
        raise InputError(f"{where}: empty; expected a header line {','.join(COLUMNS)}")
    columns = [name.strip().lower() for name in header]
    for required in ("tag", "start"):
        if required not in columns:
            raise InputError(f"{where}:1: no {required!r} column (header: {','.join(header)}); "
                             f"expected {','.join(COLUMNS)}")  # fmt: skip
    position = {name: columns.index(name) for name in COLUMNS if name in columns}
    incidents = []
    for line, row in enumerate(reader, start=2):
        if not row or all(not cell.strip() for cell in row):
            continue

        def cell(name: str, row: list[str] = row) -> str:
            i = position.get(name)
            return row[i].strip() if i is not None and i < len(row) else ""

        tag = cell("tag")
        if not tag:
            raise InputError(f"{where}:{line}: empty tag")
        try:
            start = parse_time(cell("start"))
        except ValueError as exc:
            raise InputError(f"{where}:{line}: start: {exc}") from None
        end: int | None = None
        if cell("end"):
            try:
                end = parse_time(cell("end"))
            except ValueError as exc:
                raise InputError(f"{where}:{line}: end: {exc}") from None
            if end < start:
                raise InputError(f"{where}:{line}: end {cell('end')} is before start {cell('start')}")
        incidents.append(Incident(tag, start, end, cell("label") or f"line {line}", line))
    return incidents


@dataclass(frozen=True)
class DetectorScore:
    detected: bool
    first_raise_ns: int | None
    delay_ns: int | None
    delay_samples: int | None  # None where the tag's sample times were not at hand
    raises_inside: int

    def to_dict(self) -> dict[str, Any]:
        return {
            "detected": self.detected,
            "first_raise": format_time(self.first_raise_ns) if self.first_raise_ns is not None else None,
            "delay_s": self.delay_ns / 1e9 if self.delay_ns is not None else None,
            "delay_samples": self.delay_samples,
            "raises_inside": self.raises_inside,
        }


@dataclass
class IncidentScores:
    incidents: list[Incident]
    detectors: list[str]  # process detectors that ran, then "quality"
    scores: list[dict[str, DetectorScore]]  # per incident, per detector
    status: list[str]  # per incident: "scored", "tag not in data", "tag not monitored (no limits)"
    false_alarms: dict[str, int]  # per detector: raises outside every incident window of their tag
    false_alarms_by_tag: dict[str, dict[str, int]]
    data_end_ns: int

    def detected_by_any(self, i: int) -> DetectorScore | None:
        """The earliest detection of incident i by a process detector (the quality gate aside)."""
        found = [s for d, s in self.scores[i].items() if d != "quality" and s.detected]
        return min(found, key=lambda s: s.first_raise_ns or 0) if found else None

    def to_dict(self) -> dict[str, Any]:
        rows = []
        for incident, score, status in zip(self.incidents, self.scores, self.status, strict=True):
            start, end = incident.window(self.data_end_ns)
            rows.append({
                "tag": incident.tag, "label": incident.label, "start": format_time(start),
                "end": format_time(incident.end_ns) if incident.end_ns is not None else None,
                "status": status, "detectors": {d: s.to_dict() for d, s in score.items()},
            })  # fmt: skip
        per_detector = {}
        for d in self.detectors:
            delays = [(s[d].delay_ns or 0) / 1e9 for s in self.scores if d in s and s[d].delay_ns is not None]
            per_detector[d] = {
                "detected": sum(1 for s in self.scores if d in s and s[d].detected),
                "incidents": sum(1 for st in self.status if st == "scored"),
                "median_delay_s": float(np.median(delays)) if delays else None,
                "false_alarms": self.false_alarms.get(d, 0),
            }
        return {
            "rule": "detected: a raise on the incident's tag between start and end (both included; no end: to the "
                    "end of the data); delay from start to the first such raise; false alarm: a raise outside "
                    "every incident window of its tag",
            "incidents": rows,
            "by_detector": per_detector,
            "false_alarms_by_tag": self.false_alarms_by_tag,
        }  # fmt: skip


def score_incidents(events: EventArrays, incidents: Sequence[Incident], detectors: Sequence[str], data_end_ns: int,
                    *, sample_times: Mapping[str, np.ndarray] | None = None,
                    monitored: Mapping[str, bool] | None = None) -> IncidentScores:  # fmt: skip
    """Score every incident for every detector, and count the raises that fall outside all incidents.

    ``sample_times`` (tag -> sorted sample times, ns) gives the delays in samples; ``monitored`` (tag ->
    has limits) tells a tag that was skipped from one that was never in the data.
    """
    names = events.tag_names
    scored_detectors = [d for d in DETECTORS if d in detectors and d != "quality"] + ["quality"]
    opening = events.openings(include_quality=True)
    windows_by_tag: dict[str, list[tuple[int, int]]] = {}
    for incident in incidents:
        windows_by_tag.setdefault(incident.tag, []).append(incident.window(data_end_ns))

    rows_by_tag: dict[int, np.ndarray] = {}
    no_rows = np.empty(0, np.int64)
    opening_rows = np.flatnonzero(opening)
    if opening_rows.shape[0]:
        order = np.argsort(events.tag[opening_rows], kind="stable")
        sorted_rows = opening_rows[order]
        tags, first = np.unique(events.tag[sorted_rows], return_index=True)
        for t, lo, hi in zip(tags, first, [*first[1:], sorted_rows.shape[0]], strict=True):
            rows_by_tag[int(t)] = sorted_rows[lo:hi]  # time order kept: events are in time order
    tag_index = {name: i for i, name in enumerate(names)}

    scores: list[dict[str, DetectorScore]] = []
    status: list[str] = []
    for incident in incidents:
        start, end = incident.window(data_end_ns)
        t = tag_index.get(incident.tag)
        if monitored is not None and incident.tag not in monitored:
            status.append("tag not in data")
        elif monitored is not None and not monitored[incident.tag]:
            status.append("tag not monitored (no limits)")
        else:
            status.append("scored")
        rows = rows_by_tag.get(t, no_rows) if t is not None else no_rows
        inside = rows[(events.ts[rows] >= start) & (events.ts[rows] <= end)]
        per_detector = {}
        times = sample_times.get(incident.tag) if sample_times is not None else None
        for d in scored_detectors:
            mine = inside[events.detector[inside] == DETECTORS.index(d)]
            if mine.shape[0] == 0:
                per_detector[d] = DetectorScore(False, None, None, None, 0)
                continue
            first_raise = int(events.ts[mine[0]])
            samples: int | None = None
            if times is not None:
                samples = int(np.searchsorted(times, first_raise, "right") - np.searchsorted(times, start, "left"))
            per_detector[d] = DetectorScore(True, first_raise, first_raise - start, samples, int(mine.shape[0]))
        scores.append(per_detector)

    false_alarms = {d: 0 for d in scored_detectors}
    false_by_tag: dict[str, dict[str, int]] = {}
    for t, rows in rows_by_tag.items():
        outside = np.ones(rows.shape[0], np.bool_)
        for start, end in windows_by_tag.get(names[t], []):
            outside &= ~((events.ts[rows] >= start) & (events.ts[rows] <= end))
        counts = np.bincount(events.detector[rows[outside]], minlength=len(DETECTORS))
        for d in scored_detectors:
            c = int(counts[DETECTORS.index(d)])
            if c:
                false_alarms[d] += c
                false_by_tag.setdefault(names[t], {})[d] = c
    return IncidentScores(list(incidents), scored_detectors, scores, status, false_alarms, false_by_tag, data_end_ns)


def describe_delay(score: DetectorScore) -> str:
    if not score.detected or score.delay_ns is None:
        return "missed"
    text = format_duration(score.delay_ns) if score.delay_ns > 0 else "0 s"
    if score.delay_samples is not None:
        text += f" ({score.delay_samples} samples)"
    return text


def format_incidents(scores: IncidentScores, max_rows: int = 40) -> list[str]:
    """The incidents table printed after the replay: one line per incident, a column per detector."""
    width = 24
    header = f"{'incident':<36} " + " ".join(f"{d:<{width}}" for d in scores.detectors)
    lines = ["incidents (delay from onset to first raise):", header, "-" * len(header)]
    for k, (incident, score, status) in enumerate(zip(scores.incidents, scores.scores, scores.status, strict=True)):
        if k == max_rows:
            lines.append(f"... {len(scores.incidents) - max_rows} more incidents in summary.json and the report")
            break
        name = f"{incident.tag} {incident.label}"[:36]
        if status != "scored":
            lines.append(f"{name:<36} {status}")
            continue
        lines.append(f"{name:<36} " + " ".join(f"{describe_delay(score[d]):<{width}}" for d in scores.detectors))
    lines.append(f"{'false alarms (outside every incident)':<36} "
                 + " ".join(f"{scores.false_alarms.get(d, 0):<{width}}" for d in scores.detectors))  # fmt: skip
    return lines
