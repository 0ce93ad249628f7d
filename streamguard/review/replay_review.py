"""Review of one replay: alarm load, raises against the design, known incidents, and the HTML report.

Called by ``streamguard replay --report/--incidents`` after the replay and before summary.json is
written; it adds its sections to ``result.summary`` and returns the lines to print.
"""

from __future__ import annotations

import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..config import Config
from ..replay import ReplayResult
from .alarm_load import AlarmLoad, AlarmLoadSettings, alarm_load, format_alarm_load
from .design_check import design_rows
from .event_arrays import EventArrays, alarm_intervals
from .figures import require_matplotlib
from .incidents import IncidentScores, format_incidents, read_incidents, score_incidents
from .report import ReportInputs, ReportSettings, build_report
from .tag_traces import collect_samples, trace_tags


@dataclass(frozen=True)
class ReviewSettings:
    alarm_load: AlarmLoadSettings = field(default_factory=AlarmLoadSettings)
    report: ReportSettings = field(default_factory=ReportSettings)
    design_alpha: float = 1e-3  # two-sided Poisson tail below which a tag disagrees with its design


def data_period(result: ReplayResult) -> tuple[int, int]:
    """First and last sample time over all tags (ns); (0, 0) when nothing was read."""
    pipeline = result.pipeline
    n = len(pipeline.tags)
    first = pipeline.gate_state.first_ts[:n]
    last = pipeline.gate_state.last_ts[:n]
    seen = first != 0
    if not seen.any():
        return 0, 0
    return int(first[seen].min()), int(last[seen].max())


def review_replay(result: ReplayResult, config: Config, *, report_path: str | Path | None = None,
                  incidents_path: str | Path | None = None, settings: ReviewSettings | None = None,
                  show_progress: bool | None = None) -> list[str]:  # fmt: skip
    """Add ``alarm_load``, ``design_check`` (and ``incidents``) to ``result.summary``; write the report.

    Returns the lines to print after the replay summary. The files are read a second time only for the
    tags that are drawn or scored against incidents, and only when a report or incidents are asked for.
    """
    settings = settings or ReviewSettings()
    if report_path:
        require_matplotlib()
    progress = sys.stderr.isatty() if show_progress is None else show_progress
    started = time.monotonic()
    incidents = read_incidents(incidents_path) if incidents_path else None
    start_ns, end_ns = data_period(result)
    events = EventArrays.of(result.events, result.pipeline.tags.names)
    load = alarm_load(events, start_ns, end_ns, settings.alarm_load)
    design = design_rows(result.pipeline, settings.design_alpha)
    result.summary["alarm_load"] = load.to_dict()
    result.summary["design_check"] = [row.to_dict() for row in design]

    drawn = _drawn_tags(load, settings.report) if report_path else []
    wanted = set(drawn) | ({i.tag for i in incidents} if incidents else set())
    samples = collect_samples(result.paths, config, wanted, show_progress=progress) if wanted else {}

    scores: IncidentScores | None = None
    if incidents is not None:
        tags = result.pipeline.tags
        monitored = {name: bool(tags.limit_source[t]) for t, name in enumerate(tags.names)}
        sample_times = {name: np.sort(s.ts) for name, s in samples.items()}
        scores = score_incidents(events, incidents, result.pipeline.detectors, end_ns, sample_times=sample_times,
                                 monitored=monitored)  # fmt: skip
        result.summary["incidents"] = scores.to_dict() | {"source": str(incidents_path)}

    lines = format_alarm_load(load)
    flagged = [row for row in design if row.flag]
    if flagged:
        names = sorted({row.tag for row in flagged})
        lines.append(f"raises disagree with the design on {len(names)} tags: " + ", ".join(names[:12])
                     + (" ..." if len(names) > 12 else ""))  # fmt: skip
    if scores is not None:
        lines.extend(format_incidents(scores))

    if report_path:
        limits = result.pipeline.tags.limits
        traces = trace_tags(config, limits, samples)
        inputs = ReportInputs(result, config, load, design, alarm_intervals(events), scores, traces, start_ns,
                              end_ns, {name: i for i, name in enumerate(events.tag_names)})  # fmt: skip
        text = build_report(inputs, settings.report, [t for t in drawn if t in traces],
                            str(incidents_path) if incidents_path else None)  # fmt: skip
        path = Path(report_path)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
        lines.append(f"wrote {path} ({len(text.encode()) / 1e6:.2f} MB, {text.count('<svg')} figures) "
                     f"in {time.monotonic() - started:.1f} s")  # fmt: skip
    return lines


def _drawn_tags(load: AlarmLoad, settings: ReportSettings) -> list[str]:
    """The most alarming tags by process raises (the ranking the alarm-load section uses)."""
    ranked = sorted(((sum(n for d, n in by.items() if d != "quality"), tag) for tag, by in load.raises_by_tag.items()),
                    key=lambda item: (-item[0], item[1]))  # fmt: skip
    return [tag for count, tag in ranked if count > 0][: settings.max_tags]
