"""The replay report's content: which sections, tables and figures, in what order, and why.

Sections, in the order an engineer and an alarm owner go through them: overview of what was replayed;
the alarm load against the published benchmarks; each tag's raises against its design; the alarmed
tags, one figure per episode (most alarming tags first, capped); the known incidents, if given; and
how to read it all. Everything here is layout; the numbers come from ``alarm_load``,
``design_check`` and ``incidents``, the pictures from ``figures``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from ..config import Config
from ..durations import format_duration
from ..replay import ReplayResult
from ..timeparse import format_time
from . import figures
from .alarm_load import SOURCES, AlarmLoad
from .design_check import DesignRow
from .event_arrays import DETECTORS, AlarmIntervals
from .html import Cell, Section, facts, figure, page, paragraph, table
from .incidents import Incident, IncidentScores, describe_delay
from .tag_traces import TagTrace


@dataclass(frozen=True)
class ReportSettings:
    """Caps that keep a month of hundreds of tags to a few MB; the statistics themselves are never capped."""

    max_tags: int = 10  # alarmed tags drawn, most alarming first
    episodes_per_tag: int = 2  # the busiest episodes of each drawn tag
    max_incident_figures: int = 8  # incidents no process detector caught, drawn around their window
    max_table_rows: int = 200  # per-tag tables; the full lists are in summary.json
    merge_points: int = 30  # alarms closer than this many point periods are one episode
    pad_points: int = 20  # context drawn before and after an episode, in point periods
    max_window_points: int = 900  # longest stretch drawn in one figure, in point periods


@dataclass
class ReportInputs:
    result: ReplayResult
    config: Config
    load: AlarmLoad
    design: list[DesignRow]
    intervals: AlarmIntervals
    incidents: IncidentScores | None
    traces: dict[str, TagTrace]
    data_start_ns: int
    data_end_ns: int
    event_tag_index: dict[str, int]  # tag name -> index used in ``intervals``


# ---------------------------------------------------------------------------------------------------
# Episodes


def point_period_ns(trace: TagTrace) -> int:
    if trace.point_ts.shape[0] > 1:
        return max(int(np.median(np.diff(trace.point_ts))), 10**9)
    return 60 * 10**9


def tag_intervals(inputs: ReportInputs, tag: str) -> list[tuple[str, int, int, int]]:
    """(detector, raise ns, clear ns or -1, direction) of every alarm on the tag."""
    t = inputs.event_tag_index.get(tag)
    if t is None:
        return []
    intervals = inputs.intervals
    mine = np.flatnonzero(intervals.tag == t)
    return [(DETECTORS[int(intervals.detector[i])], int(intervals.start[i]), int(intervals.end[i]),
             int(intervals.direction[i])) for i in mine]  # fmt: skip


def episodes(intervals: Sequence[tuple[str, int, int, int]], data_end_ns: int,
             merge_ns: int) -> list[tuple[int, int, int]]:  # fmt: skip
    """Alarm intervals of all detectors merged when they overlap or lie within ``merge_ns``: (start, end, raises)."""
    spans = sorted((start, end if end >= 0 else data_end_ns) for _d, start, end, _dir in intervals)
    merged: list[list[int]] = []
    for start, end in spans:
        if merged and start <= merged[-1][1] + merge_ns:
            merged[-1][1] = max(merged[-1][1], end)
            merged[-1][2] += 1
        else:
            merged.append([start, end, 1])
    return [(a, b, n) for a, b, n in merged]


def episode_window(start: int, end: int, period: int, settings: ReportSettings,
                   incidents: Sequence[Incident], data_start: int, data_end: int) -> tuple[int, int, bool]:  # fmt: skip
    """The stretch drawn: the episode with context, reaching back to an overlapping incident's onset."""
    longest = settings.max_window_points * period
    pad = min(max(settings.pad_points * period, (end - start) // 4), longest // 8)
    lo, hi = start - pad, end + pad
    for incident in incidents:
        i_start, i_end = incident.window(data_end)
        # Reach back to show the onset, unless it lies so far back that the episode would not fit.
        if i_start <= end and i_end >= start and i_start >= start - longest // 2:
            lo = min(lo, i_start - settings.pad_points * period)
    lo, hi = max(lo, data_start), min(hi, data_end)
    cut = hi - lo > longest
    if cut:
        hi = lo + longest
    return lo, hi, cut


# ---------------------------------------------------------------------------------------------------
# Sections


def overview_section(inputs: ReportInputs) -> Section:
    summary = inputs.result.summary
    totals = summary["totals"]
    section = Section("overview", "Overview")
    span = inputs.data_end_ns - inputs.data_start_ns
    monitored = totals["tags"] - len(summary["tags_without_limits"])
    raises = sum(totals["raises"].values())
    section.add(facts([
        (format_duration(span) if span > 0 else "-", "period replayed"),
        (f"{monitored:,} / {totals['tags']:,}", "tags monitored / seen"),
        (f"{totals['samples_read']:,}", "samples read"),
        (f"{totals['samples_used']:,}", "samples used"),
        (f"{totals['samples_read'] - totals['samples_used']:,}", "samples excluded"),
        (f"{raises:,}", "alarms raised"),
    ]))  # fmt: skip
    section.add(paragraph(f"From {format_time(inputs.data_start_ns)} to {format_time(inputs.data_end_ns)}; "
                          f"limits version {summary['limits_version']}; files: {', '.join(summary['inputs'])}.",
                          "note"))  # fmt: skip
    excluded = totals["excluded"]
    if excluded:
        section.add("<h3>Samples excluded by the quality gate</h3>")
        section.add(table(["reason", "samples", "share of read"],
                          [(k, v, Cell(f"{100 * v / max(totals['samples_read'], 1):.3f} %", True))
                           for k, v in sorted(excluded.items(), key=lambda kv: -kv[1])]))  # fmt: skip
    skipped = totals["rows_skipped_by_reader"].get("counts") or {}
    if skipped:
        section.add("<h3>Rows the reader could not read</h3>")
        section.add(table(["reason", "rows"], sorted(skipped.items(), key=lambda kv: -kv[1])))
    section.add("<h3>Events by detector and kind</h3>")
    counts: dict[str, dict[str, int]] = {}
    for event in inputs.result.events:
        counts.setdefault(event.detector, {}).setdefault(event.kind, 0)
        counts[event.detector][event.kind] += 1
    kinds = [k for k in ("raise", "clear", "gap", "stale", "stale_end", "range", "range_end")
             if any(k in row for row in counts.values())]  # fmt: skip
    rows = [(d, *(counts[d].get(k, 0) for k in kinds), sum(counts[d].values())) for d in DETECTORS if d in counts]
    section.add(table(["detector", *kinds, "all"], rows, [False, *([True] * (len(kinds) + 1))]) if rows
                else paragraph("No events: nothing raised, no data-quality notices.", "note"))  # fmt: skip
    config = inputs.config
    section.add("<h3>Settings replayed</h3>")
    detector_rows = [(name, ", ".join(f"{k} {_setting(v)}" for k, v in params.model_dump(by_alias=True).items()))
                     for name, params in config.detectors.enabled().items()]  # fmt: skip
    detector_rows.append(("alarm state", f"clear after {config.alarms.clear_after} in-control points"))
    subgroup = config.subgroup.model_dump(exclude_none=True)
    detector_rows.append(("subgroup", ", ".join(f"{k} {v}" for k, v in subgroup.items())))
    section.add(table(["stage", "settings (defaults; tags may override)"], detector_rows))
    if summary["tags_without_limits"]:
        names = summary["tags_without_limits"]
        section.add(paragraph(f"Skipped, no limits ({len(names)}): " + ", ".join(names[:40])
                              + (" ..." if len(names) > 40 else ""), "note"))  # fmt: skip
    return section


def _setting(value: object) -> str:
    if isinstance(value, list | tuple):
        return "[" + ", ".join(str(v) for v in value) + "]"
    return str(value)


_VERDICT_WORDS = {"meets": "meets", "manageable": "manageable", "above": "above"}


def alarm_load_section(inputs: ReportInputs) -> Section:
    load = inputs.load
    f = load.figures
    s = load.settings
    section = Section("alarm-load", "Alarm load")
    section.add(facts([
        (f"{int(f['alarms']):,}", "alarms"),
        (f"{f['alarms_per_hour']:.2f}", "per hour (average)"),
        (f"{f['alarms_per_10_minutes']:.2f}", "per 10 minutes (average)"),
        (f"{f['peak_10_minutes']:.0f}", "most in one 10-minute window"),
        (f"{f['flood_share_percent']:.2f} %", f"10-minute windows with more than {s.flood_above}"),
        (f"{f['top_share_percent']:.1f} %", f"of alarms from the top {int(f['top_tags'])} tags"),
        (f"{f['chattering_sources']:.0f}", "chattering alarm sources"),
        (f"{f['standing_alarms']:.0f}", f"alarms standing longer than {s.standing_ns / 3.6e12:g} h"),
    ]))  # fmt: skip
    rows = []
    for check in load.checks:
        value = check["value"]
        text = f"{value:,.0f}" if value == int(value) else f"{value:,.2f}"
        rows.append((check["label"], Cell(text, True), check["target"],
                     Cell(_VERDICT_WORDS[check["verdict"]], False, f"verdict {check['verdict']}"),
                     Cell(check["source"], False, "source")))  # fmt: skip
    section.add(table(["figure", "this replay", "benchmark", "verdict", "source of the benchmark"], rows,
                      [False, True, False, False, False]))  # fmt: skip
    who = "one operating position" if s.operating_positions == 1 else f"{s.operating_positions} operating positions"
    section.add(paragraph(
        f"Alarms are {load.to_dict()['definitions']['alarms']}; the whole tag set is taken as {who}. "
        "The benchmarks are the published defaults and a site's alarm philosophy may set its own; they are "
        "meant for at least 30 days of data, so a shorter replay gives an indication only.", "note"))  # fmt: skip
    section.add(figure(figures.alarm_rate_figure(load), "Alarms counted in clock-aligned 10-minute windows; "
                       "the dashed line is the flood threshold, the dotted one the average."))  # fmt: skip
    detectors = inputs.result.pipeline.detectors
    if load.top_tags:
        section.add(figure(figures.top_tags_figure(load, detectors),
                           "Raises of the most frequent tags, split by detector; the share is of all alarms."))
    if load.chattering:
        section.add("<h3>Chattering</h3>")
        section.add(table(["tag", "detector", "raises in bursts", "raises", "first burst"],
                          [(c["tag"], c["detector"], c["raises_in_bursts"], c["raises"], c["first_burst"])
                           for c in load.chattering[:25]]))  # fmt: skip
    if load.standing:
        section.add(f"<h3>Alarms standing longer than {s.standing_ns / 3.6e12:g} hours</h3>")
        section.add(table(["tag", "detector", "raised", "hours in alarm", "cleared"],
                          [(r["tag"], r["detector"], r["raised"], r["hours"], r["cleared"])
                           for r in load.standing[:25]]))  # fmt: skip
    return section


def design_section(inputs: ReportInputs, settings: ReportSettings) -> Section:
    section = Section("design", "Raises against the design")
    rows = inputs.design
    if not rows:
        return section.add(paragraph("No monitored tags.", "note"))
    if not any(r.arl_points for r in rows):
        section.add(paragraph("The run-length engine (streamguard.design) is not available: designed intervals "
                              "are shown as '-'.", "note"))  # fmt: skip
    detectors = [d for d in DETECTORS if any(r.detector == d for r in rows)]
    by_tag: dict[str, dict[str, DesignRow]] = {}
    for r in rows:
        by_tag.setdefault(r.tag, {})[r.detector] = r
    busy = [t for t, mine in by_tag.items() if any(r.raises or r.flag for r in mine.values())]
    busy.sort(key=lambda t: (not any(r.flag for r in by_tag[t].values()),
                             -sum(r.raises for r in by_tag[t].values()), t))  # fmt: skip
    shown = busy[: settings.max_table_rows]
    table_rows = []
    for tag in shown:
        mine = by_tag[tag]
        cells: list[object] = [tag, next(iter(mine.values())).points]
        for d in detectors:
            found = mine.get(d)
            if found is None:
                cells.append(Cell("-", True))
                continue
            expected = found.expected_raises
            text = f"{found.raises:,} ({expected:.2g})" if expected is not None else f"{found.raises:,} (-)"
            cells.append(Cell(text, True, "flag" if found.flag else ""))
        intervals = sorted(r.designed_interval_ns for r in mine.values() if r.designed_interval_ns)
        cells.append(Cell(format_duration(intervals[0]) if intervals and intervals[0] == intervals[-1] else
                          f"{format_duration(intervals[0])} – {format_duration(intervals[-1])}" if intervals else "-",
                          True))  # fmt: skip
        flagged = {r.flag for r in mine.values() if r.flag}
        cells.append("; ".join(f"{flag}: " + ", ".join(d for d, r in mine.items() if r.flag == flag)
                               for flag in sorted(flagged)))  # fmt: skip
        table_rows.append(cells)
    if table_rows:
        section.add(table(["tag", "points", *(f"{d} raises (designed)" for d in detectors), "designed interval",
                           "disagrees with the design"], table_rows))  # fmt: skip
    quiet = [t for t in by_tag if t not in busy]
    if quiet:
        expected = sum(r.expected_raises or 0.0 for t in quiet for r in by_tag[t].values())
        section.add(paragraph(f"{len(quiet):,} other monitored tags raised nothing; their design expected "
                              f"{expected:.2g} raises in all over the period (the chance of none is "
                              f"{100 * math.exp(-expected):.0f} %).", "note"))  # fmt: skip
    if len(busy) > len(shown):
        section.add(paragraph(f"{len(busy) - len(shown):,} more alarming tags are listed in summary.json under "
                              "design_check.", "note"))  # fmt: skip
    section.add(paragraph(
        "In brackets: the raises the design expects over the tag's span for an in-control process, i.e. the span "
        "divided by the designed interval, which is the detector's in-control average run length (from the "
        "run-length engine, for independent normal points and known limits) times the time one point takes. "
        "A tag disagrees with the design when its count is outside the Poisson range of that expectation "
        "(either tail below 0.1 %): more means a real change, autocorrelation or a sigma estimated too small; "
        "fewer, limits estimated too wide. Raises are counted after the clear-after hysteresis.", "note"))  # fmt: skip
    svg = figures.design_figure(rows)
    if svg:
        section.add(figure(svg, "Each mark is a tag and detector; on the dashed line the tag raised exactly as "
                                "designed. Filled marks disagree with the design."))  # fmt: skip
    return section


def episodes_section(inputs: ReportInputs, settings: ReportSettings, drawn_tags: Sequence[str]) -> Section:
    section = Section("tags", "Alarmed tags")
    load = inputs.load
    if not drawn_tags:
        return section.add(paragraph("No process alarms were raised.", "note"))
    alarmed = [t for t in load.raises_by_tag if any(d != "quality" for d in load.raises_by_tag[t])]
    section.add(paragraph(f"{len(alarmed):,} tags raised alarms; the {len(drawn_tags)} most alarming are drawn, "
                          f"each around its {settings.episodes_per_tag} busiest episodes. An episode is a run of "
                          f"alarms less than {settings.merge_points} points apart.", "note"))  # fmt: skip
    incidents_by_tag = _incidents_by_tag(inputs)
    for tag in drawn_tags:
        trace = inputs.traces.get(tag)
        raises = load.raises_by_tag.get(tag, {})
        units = f" [{trace.units}]" if trace is not None and trace.units else ""
        section.add(f'<h3 id="tag-{_anchor(tag)}">{_text(tag)}{_text(units)} — '
                    + _text(", ".join(f"{d} {n:,}" for d, n in raises.items())) + " raises</h3>")  # fmt: skip
        if trace is None:
            section.add(paragraph("No samples found for this tag when reading the files again.", "note"))
            continue
        section.add(*_episode_figures(inputs, settings, trace, incidents_by_tag.get(tag, [])))
    return section


def _episode_figures(inputs: ReportInputs, settings: ReportSettings, trace: TagTrace,
                     incidents: Sequence[Incident]) -> list[str]:  # fmt: skip
    intervals = tag_intervals(inputs, trace.name)
    period = point_period_ns(trace)
    found = episodes(intervals, inputs.data_end_ns, settings.merge_points * period)
    busiest = sorted(sorted(found, key=lambda e: -e[2])[: settings.episodes_per_tag])
    parts = []
    for k, (start, end, count) in enumerate(busiest, start=1):
        lo, hi, cut = episode_window(start, end, period, settings, incidents, inputs.data_start_ns, inputs.data_end_ns)
        title = f"{trace.name} — episode {k} of {len(found)}: {format_time(start)} to {format_time(end)}"
        svg = figures.episode_figure(trace, (lo, hi), intervals, incidents, inputs.data_end_ns, title,
                                     salt=f"ep-{trace.name}-{k}")  # fmt: skip
        caption = f"{count:,} alarm intervals; drawn {format_time(lo)} to {format_time(hi)}"
        if cut:
            caption += f" (the first {settings.max_window_points} point periods of a longer episode)"
        parts.append(figure(svg, caption + "."))
    return parts


def incidents_section(inputs: ReportInputs, settings: ReportSettings, source: str) -> Section:
    scores = inputs.incidents
    assert scores is not None
    section = Section("incidents", "Known incidents")
    detectors = scores.detectors
    rows: list[tuple[object, ...]] = []
    for incident, score, status in zip(scores.incidents, scores.scores, scores.status, strict=True):
        window = span_text(incident.start_ns, incident.end_ns)
        if status != "scored":
            rows.append((incident.tag, incident.label, window, *([status] + [""] * (len(detectors) - 1))))
            continue
        cells: list[object] = [Cell(describe_delay(score[d]), False, "" if score[d].detected else "missed")
                               for d in detectors]  # fmt: skip
        rows.append((incident.tag, incident.label, window, *cells))
    section.add(paragraph(f"Incidents from {source}. Each cell: delay from the onset to the detector's first raise "
                          "on the tag inside the incident window (in time and in the tag's samples), or missed.",
                          "note"))  # fmt: skip
    section.add(table(["tag", "incident", "window (UTC)", *detectors], rows))
    summary = scores.to_dict()["by_detector"]
    section.add("<h3>By detector</h3>")
    section.add(table(["detector", "incidents detected", "median delay", "false alarms (outside every incident)"],
                      [(d, f"{v['detected']} of {v['incidents']}",
                        format_duration(v["median_delay_s"] * 1e9) if v["median_delay_s"] else
                        ("0 s" if v["median_delay_s"] == 0 else None), v["false_alarms"])
                       for d, v in summary.items()],
                      [False, False, True, True]))  # fmt: skip
    svg = figures.incident_figure(scores)
    if svg:
        section.add(figure(svg, "Delay from onset to first raise (log scale); hollow marks at the right: missed."))
    missed = [i for i, st in enumerate(scores.status) if st == "scored" and scores.detected_by_any(i) is None]
    drawn = 0
    for i in missed:
        incident = scores.incidents[i]
        trace = inputs.traces.get(incident.tag)
        if trace is None or drawn >= settings.max_incident_figures:
            continue
        if drawn == 0:
            section.add("<h3>Incidents no process detector raised on</h3>")
        period = point_period_ns(trace)
        start, end = incident.window(inputs.data_end_ns)
        lo = max(start - settings.pad_points * period, inputs.data_start_ns)
        hi = min(end + settings.pad_points * period, lo + settings.max_window_points * period, inputs.data_end_ns)
        title = f"{incident.tag} — {incident.label}"
        svg = figures.episode_figure(trace, (lo, hi), tag_intervals(inputs, incident.tag), [incident],
                                     inputs.data_end_ns, title, salt=f"inc-{i}")  # fmt: skip
        caption = f"Incident window shaded; quality gate: {describe_delay(scores.scores[i]['quality'])}."
        section.add(figure(svg, caption))
        drawn += 1
    return section


def method_section(inputs: ReportInputs) -> Section:
    load = inputs.load
    section = Section("reading", "How to read this report")
    definitions = load.to_dict()["definitions"]
    items = [
        ("alarm", f"a {definitions['alarms']}: one detector's transition from in control to signalling on one tag; "
                  "it clears after the configured number of in-control points"),
        ("flood", f"a 10-minute window (clock-aligned, UTC) with {definitions['flood']}"),
        ("chattering", definitions["chattering"]),
        ("standing alarm", f"in alarm for longer than {definitions['standing_hours']:g} hours (ISA-18.2: stale)"),
        ("false alarm", "with an incidents file: a raise outside every incident window of its tag"),
        ("markers", "▲/▼ filled: raise (up/down), ◆ hollow: clear, ×: sample excluded by the quality gate "
                    "(▲/▼ grey at the edge: off scale or not a number); shaded band: a known incident, its onset "
                    "a solid line; dashed lines: limits"),
        ("detectors", "each has its colour, marker and hatch: Shewhart ●, CUSUM ■ ////, EWMA ◆ ...., "
                      "spread ✚ xx, quality ✖"),
    ]  # fmt: skip
    section.add(table(["term", "meaning here"], items))
    used = sorted({key for benchmark in load.settings.benchmarks for key in benchmark.sources})
    section.add("<h3>Sources of the benchmarks</h3>")
    section.add("<dl>" + "".join(f"<dt>{_text(key)}</dt><dd>{_text(SOURCES.get(key, key))}</dd>" for key in used)
                + "</dl>")  # fmt: skip
    section.add(paragraph("Figures are thinned for display only (each display bucket keeps its lowest and "
                          "highest value); every number in the tables and in summary.json uses all the data.",
                          "note"))  # fmt: skip
    return section


def span_text(start: int, end: int | None) -> str:
    """A window in few characters: the end's date only when it differs from the start's."""
    first = format_time(start).rstrip("Z").replace("T", " ")
    if end is None:
        return f"{first} – (open)"
    last = format_time(end).rstrip("Z").replace("T", " ")
    return f"{first} – {last[11:] if last[:10] == first[:10] else last}"


def _incidents_by_tag(inputs: ReportInputs) -> dict[str, list[Incident]]:
    out: dict[str, list[Incident]] = {}
    if inputs.incidents is not None:
        for incident in inputs.incidents.incidents:
            out.setdefault(incident.tag, []).append(incident)
    return out


def _text(value: object) -> str:
    from .html import esc

    return esc(value)


def _anchor(tag: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in tag)


def build_report(inputs: ReportInputs, settings: ReportSettings, drawn_tags: Sequence[str],
                 incidents_source: str | None) -> str:  # fmt: skip
    from .. import __version__

    sections = [overview_section(inputs), alarm_load_section(inputs), design_section(inputs, settings),
                episodes_section(inputs, settings, drawn_tags)]  # fmt: skip
    if inputs.incidents is not None:
        sections.append(incidents_section(inputs, settings, incidents_source or "the incidents file"))
    sections.append(method_section(inputs))
    subtitle = [
        f"{format_time(inputs.data_start_ns)} — {format_time(inputs.data_end_ns)}",
        f"{len(inputs.result.summary['tags'])} tags · detectors: {', '.join(inputs.result.pipeline.detectors)} · "
        f"limits {inputs.result.summary['limits_version']}",
    ]  # fmt: skip
    return page("Replay review", subtitle, sections, f"streamguard {__version__} · replay review · "
                "self-contained: no scripts, fonts or images are fetched")  # fmt: skip


