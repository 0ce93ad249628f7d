"""Several detector settings replayed on the same history in one pass, and set side by side.

This is how a site decides between h = 5 and h = 6: the same samples, in the same order, go through
one pipeline per setting (each chunk is read once and handed to every pipeline), and the settings are
compared on what matters to the people who will live with them: raises, false alarms, incidents
detected and how late, and the alarm load. Each pipeline is the one the live service would run, so
each column is what that setting would have done.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..config import Config
from ..errors import UsageError
from ..events import Event
from ..limits import LimitsFile
from ..pipeline import Pipeline
from ..progress import Progress
from ..replay import ReplayResult, input_settings, summarize
from ..sources.historian import ReadProblems, read_historian
from ..types import Batch
from .alarm_load import AlarmLoad, AlarmLoadSettings, alarm_load
from .event_arrays import EventArrays
from .incidents import Incident, IncidentScores, score_incidents


@dataclass(frozen=True)
class Contender:
    """One setting in the comparison: a label for the tables, its config and limits."""

    label: str
    config: Config
    limits: LimitsFile | None
    source: str = ""  # the config file, for messages


def replay_side_by_side(contenders: Sequence[Contender], paths: Sequence[str | Path], *, strict: bool = False,
                        show_progress: bool = False, chunk_rows: int = 1_000_000) -> list[ReplayResult]:  # fmt: skip
    """Read the files once; every chunk goes through every contender's pipeline. One result per contender."""
    if len(contenders) < 2:
        raise UsageError("weigh: give at least two settings (--config A.yaml --config B.yaml)")
    reference = contenders[0].config.input
    for contender in contenders[1:]:
        if contender.config.input != reference:
            raise UsageError(f"{contender.source or contender.label}: its input: section differs from "
                             f"{contenders[0].source or contenders[0].label}'s; the files are read once, so every "
                             "config must read them the same way")  # fmt: skip
    pipelines = [Pipeline(c.config, c.limits) for c in contenders]
    events: list[list[Event]] = [[] for _ in contenders]
    problems = ReadProblems()
    progress = Progress(len(paths), enabled=show_progress)
    try:
        for chunk in read_historian(list(paths), input_settings(contenders[0].config), strict=strict,
                                    problems=problems, chunk_rows=chunk_rows):  # fmt: skip
            for pipeline, found in zip(pipelines, events, strict=True):
                index = pipeline.tags.lookup(chunk.names)
                found.extend(pipeline.process(Batch.of(index[chunk.codes], chunk.ts, chunk.value, chunk.quality)))
            progress.update(len(chunk), chunk.source)
    finally:
        progress.close()
    results = []
    for pipeline, found in zip(pipelines, events, strict=True):
        found.sort(key=Event.sort_key)
        result = ReplayResult(pipeline, found, problems, [str(p) for p in paths])
        result.summary = summarize(result)
        results.append(result)
    return results


@dataclass
class Standing:
    """One contender's results, reduced to what the comparison shows."""

    label: str
    result: ReplayResult
    events: EventArrays
    load: AlarmLoad
    scores: IncidentScores | None
    raises_by_tag: dict[str, int] = field(default_factory=dict)
    false_by_tag: dict[str, int] = field(default_factory=dict)

    @property
    def raises(self) -> int:
        return int(self.load.figures["alarms"])

    @property
    def false_alarms(self) -> int | None:
        if self.scores is None:
            return None
        return sum(n for d, n in self.scores.false_alarms.items() if d != "quality")

    def detection(self, i: int) -> tuple[str, int, int | None] | None:
        """Incident i: (detector, delay ns, delay samples) of the earliest process detector, or None if missed."""
        if self.scores is None:
            return None
        best = None
        for detector, score in self.scores.scores[i].items():
            if detector == "quality" or not score.detected or score.delay_ns is None:
                continue
            if best is None or score.delay_ns < best[1]:
                best = (detector, score.delay_ns, score.delay_samples)
        return best


def _period(results: Sequence[ReplayResult]) -> tuple[int, int]:
    from .replay_review import data_period

    return data_period(results[0])


def weigh(contenders: Sequence[Contender], results: Sequence[ReplayResult], incidents: Sequence[Incident] | None,
          settings: AlarmLoadSettings | None = None,
          sample_times: dict[str, np.ndarray] | None = None) -> list[Standing]:  # fmt: skip
    """Alarm load, incidents and per-tag counts for every contender, on the same period and definitions."""
    start, end = _period(results)
    standings = []
    for contender, result in zip(contenders, results, strict=True):
        events = EventArrays.of(result.events, result.pipeline.tags.names)
        load = alarm_load(events, start, end, settings)
        scores = None
        if incidents is not None:
            tags = result.pipeline.tags
            monitored = {name: bool(tags.limit_source[t]) for t, name in enumerate(tags.names)}
            scores = score_incidents(events, incidents, result.pipeline.detectors, end, sample_times=sample_times,
                                     monitored=monitored)  # fmt: skip
        standing = Standing(contender.label, result, events, load, scores)
        standing.raises_by_tag = {tag: sum(n for d, n in by.items() if d != "quality")
                                  for tag, by in load.raises_by_tag.items()}  # fmt: skip
        if scores is not None:
            standing.false_by_tag = {tag: sum(n for d, n in by.items() if d != "quality")
                                     for tag, by in scores.false_alarms_by_tag.items()}  # fmt: skip
        standings.append(standing)
    return standings


def overall_rows(standings: Sequence[Standing]) -> list[tuple[str, list[Any]]]:
    """(measure, value per contender) for the overall table."""
    rows: list[tuple[str, list[Any]]] = [
        ("raises", [s.raises for s in standings]),
        ("tags that raised", [sum(1 for n in s.raises_by_tag.values() if n) for s in standings]),
        ("alarms per hour", [round(s.load.figures["alarms_per_hour"], 3) for s in standings]),
        ("most alarms in 10 minutes", [int(s.load.figures["peak_10_minutes"]) for s in standings]),
        ("10-minute windows in flood [%]", [round(s.load.figures["flood_share_percent"], 3) for s in standings]),
        ("chattering alarm sources", [int(s.load.figures["chattering_sources"]) for s in standings]),
    ]
    if standings[0].scores is not None:
        scores = standings[0].scores
        scored = [i for i, st in enumerate(scores.status) if st == "scored"]
        rows.append(("false alarms (outside every incident)", [s.false_alarms for s in standings]))
        rows.append(("incidents detected", [f"{sum(1 for i in scored if s.detection(i))} of {len(scored)}"
                                            for s in standings]))  # fmt: skip
        medians = []
        for s in standings:
            delays = [d[1] for i in scored if (d := s.detection(i)) is not None]
            medians.append(_duration(float(np.median(delays))) if delays else "-")
        rows.append(("median delay of detected incidents", medians))
    return rows


def incident_rows(standings: Sequence[Standing]) -> list[list[Any]]:
    """Per incident: tag, label, then per contender the earliest process detection."""
    scores = standings[0].scores
    if scores is None:
        return []
    rows = []
    for i, incident in enumerate(scores.incidents):
        row: list[Any] = [incident.tag, incident.label]
        if scores.status[i] != "scored":
            rows.append(row + [scores.status[i]] + [""] * (len(standings) - 1))
            continue
        for s in standings:
            found = s.detection(i)
            if found is None:
                row.append("missed")
            else:
                detector, delay, samples = found
                row.append(f"{_duration(delay)}{f' ({samples} samples)' if samples is not None else ''} {detector}")
        rows.append(row)
    return rows


def tag_rows(standings: Sequence[Standing]) -> list[list[Any]]:
    """Per tag that raised under any contender: raises (and false alarms) per contender, busiest first."""
    tags = sorted({t for s in standings for t, n in s.raises_by_tag.items() if n},
                  key=lambda t: (-max(s.raises_by_tag.get(t, 0) for s in standings), t))  # fmt: skip
    with_false = standings[0].scores is not None
    rows = []
    for tag in tags:
        row: list[Any] = [tag]
        row += [s.raises_by_tag.get(tag, 0) for s in standings]
        if with_false:
            row += [s.false_by_tag.get(tag, 0) for s in standings]
        rows.append(row)
    return rows


def _duration(ns: float) -> str:
    from ..durations import format_duration

    return format_duration(ns) if ns > 0 else "0 s"


def format_weighing(standings: Sequence[Standing], max_tags: int = 30) -> list[str]:
    """The tables printed by ``streamguard weigh``."""
    labels = [s.label for s in standings]
    width = max(14, *(len(label) + 2 for label in labels))
    lines = []
    header = f"{'':<40}" + "".join(f"{label:>{width}}" for label in labels)
    lines += [header, "-" * len(header)]
    for measure, values in overall_rows(standings):
        lines.append(f"{measure:<40}" + "".join(f"{_text(v):>{width}}" for v in values))
    incidents = incident_rows(standings)
    if incidents:
        col = max(width, 30)
        lines += ["", "incidents: delay from onset to the first raise of any detector"]
        header = f"{'incident':<36}" + "".join(f"{label:<{col}}" for label in labels)
        lines += [header, "-" * len(header)]
        for row in incidents:
            lines.append(f"{(row[0] + ' ' + row[1])[:35]:<36}" + "".join(f"{_text(v):<{col}}" for v in row[2:]))
    rows = tag_rows(standings)
    if rows:
        with_false = standings[0].scores is not None
        lines += ["", "raises per tag" + (" (false alarms in brackets)" if with_false else "")]
        header = f"{'tag':<24}" + "".join(f"{label:>{width}}" for label in labels)
        lines += [header, "-" * len(header)]
        n = len(standings)
        for row in rows[:max_tags]:
            cells = [f"{row[1 + k]:,}" + (f" ({row[1 + n + k]:,})" if with_false else "") for k in range(n)]
            lines.append(f"{row[0]:<24}" + "".join(f"{c:>{width}}" for c in cells))
        if len(rows) > max_tags:
            lines.append(f"... {len(rows) - max_tags} more tags (all of them in --json and --report)")
    return lines


def _text(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return f"{value:,.3g}"
    return str(value)


def weighing_to_dict(contenders: Sequence[Contender], standings: Sequence[Standing]) -> dict[str, Any]:
    out: dict[str, Any] = {"settings": {}, "overall": {}, "tags": {}}
    for contender, standing in zip(contenders, standings, strict=True):
        out["settings"][standing.label] = {
            "config": contender.source,
            "detectors": {n: p.model_dump(by_alias=True) for n, p in contender.config.detectors.enabled().items()},
            "clear_after": contender.config.alarms.clear_after,
            "alarm_load": standing.load.to_dict(),
        }
        if standing.scores is not None:
            out["settings"][standing.label]["incidents"] = standing.scores.to_dict()
    for measure, values in overall_rows(standings):
        out["overall"][measure] = dict(zip([s.label for s in standings], values, strict=True))
    for row in tag_rows(standings):
        n = len(standings)
        out["tags"][row[0]] = {s.label: {"raises": row[1 + k]} | ({"false_alarms": row[1 + n + k]}
                                                                   if len(row) > 1 + n else {})
                               for k, s in enumerate(standings)}  # fmt: skip
    return out
