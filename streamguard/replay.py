"""Replay: historian files through the same pipeline the live service runs, to tune and check alarms.

The driver owns the I/O: it reads files (``sources.historian``), maps tag names to the pipeline's
indices, hands the pipeline batches, and writes ``events.jsonl`` (timestamp order) and
``summary.json``. Because the pipeline is the same object as in the live service, a replay of a day
gives the events the service gave that day.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from . import __version__
from .config import DETECTOR_NAMES, Config
from .events import Event
from .gate import QUALITY_KINDS, REASONS
from .limits import LimitsFile
from .pipeline import Pipeline
from .progress import Progress
from .sources.historian import InputSettings, ReadProblems, read_historian
from .timeparse import format_time
from .types import Batch

NS_PER_DAY = 86400 * 10**9


def input_settings(config: Config) -> InputSettings:
    return InputSettings(**config.input.model_dump())


@dataclass
class ReplayResult:
    pipeline: Pipeline
    events: list[Event]
    problems: ReadProblems
    paths: list[str]
    summary: dict[str, Any] = field(default_factory=dict)


def run_replay(config: Config, limits: LimitsFile | None, paths: Sequence[str | Path], *,
               strict: bool = False, show_progress: bool = False,
               chunk_rows: int = 1_000_000) -> ReplayResult:  # fmt: skip
    """Read every file as one stream (per tag in time order) and collect the events."""
    pipeline = Pipeline(config, limits)
    problems = ReadProblems()
    events: list[Event] = []
    progress = Progress(len(paths), enabled=show_progress)
    try:
        for chunk in read_historian(list(paths), input_settings(config), strict=strict, problems=problems,
                                    chunk_rows=chunk_rows):  # fmt: skip
            index = pipeline.tags.lookup(chunk.names)
            batch = Batch.of(index[chunk.codes], chunk.ts, chunk.value, chunk.quality)
            events.extend(pipeline.process(batch))
            progress.update(len(batch), chunk.source)
    finally:
        progress.close()
    events.sort(key=Event.sort_key)
    result = ReplayResult(pipeline, events, problems, [str(p) for p in paths])
    result.summary = summarize(result)
    return result


def summarize(result: ReplayResult) -> dict[str, Any]:
    """Per tag: samples read, exclusions by reason, raises per detector and per day, first raise."""
    pipeline = result.pipeline
    tags = pipeline.tags
    n = len(tags)
    counters = pipeline.counters.to_dict(n)
    first = pipeline.gate_state.first_ts[:n]
    last = pipeline.gate_state.last_ts[:n]
    per_tag: dict[str, Any] = {}
    totals_reason = np.zeros(len(REASONS), np.int64)
    totals_raises = {d: 0 for d in pipeline.detectors}
    for t, name in enumerate(tags.names):
        samples = counters["samples"][t]
        totals_reason += samples
        span_days = max(int(last[t]) - int(first[t]), 0) / NS_PER_DAY
        raises = {d: int(counters["raises"][t, DETECTOR_NAMES.index(d)]) for d in pipeline.detectors}
        for d, v in raises.items():
            totals_raises[d] += v
        per_tag[name] = {
            "limits": tags.limit_source[t] or "none (skipped: no baseline in config or limits file)",
            "samples_read": int(samples.sum()),
            "samples_used": int(samples[0]),
            "excluded": {REASONS[r]: int(samples[r]) for r in range(1, len(REASONS)) if samples[r]},
            "points": int(counters["points"][t]),
            "raises": raises,
            "raises_per_day": {d: (v / span_days if span_days > 0 else None) for d, v in raises.items()},
            "quality_events": {QUALITY_KINDS[k]: int(counters["quality_events"][t, k])
                               for k in range(1, len(QUALITY_KINDS)) if counters["quality_events"][t, k]},
            "first_raise": format_time(int(counters["first_raise_ts"][t])) if counters["first_raise_ts"][t] else None,
            "span_days": span_days,
            "units": tags.settings[t].units,
        }  # fmt: skip
    return {
        "streamguard_version": __version__,
        "inputs": result.paths,
        "limits_version": tags.limits_version,
        "tags_without_limits": tags.unconfigured(),
        "totals": {
            "tags": n,
            "samples_read": int(totals_reason.sum()),
            "samples_used": int(totals_reason[0]),
            "excluded": {REASONS[r]: int(totals_reason[r]) for r in range(1, len(REASONS)) if totals_reason[r]},
            "rows_skipped_by_reader": result.problems.to_dict(),
            "raises": totals_raises,
            "events": len(result.events),
        },
        "tags": per_tag,
    }


def write_outputs(result: ReplayResult, out_dir: str | Path) -> tuple[Path, Path]:
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    events_path = out / "events.jsonl"
    with events_path.open("w", encoding="utf-8") as handle:
        for event in result.events:
            handle.write(json.dumps(event.to_dict(), separators=(",", ":")) + "\n")
    summary_path = out / "summary.json"
    summary_path.write_text(json.dumps(result.summary, indent=2) + "\n", encoding="utf-8")
    return events_path, summary_path


def format_summary(summary: dict[str, Any]) -> str:
    """The table people read after a replay: one line per tag, alarming tags first."""
    detectors = list(summary["totals"]["raises"])
    header = f"{'tag':<16} {'samples':>9} {'used':>9} {'excluded':>9}  " + " ".join(f"{d:>9}" for d in detectors)
    header += f"  {'raises/day':>10}  first raise"
    lines = [header, "-" * len(header)]

    def order(item: tuple[str, Any]) -> tuple[int, str]:
        return (-sum(item[1]["raises"].values()), item[0])

    for name, row in sorted(summary["tags"].items(), key=order):
        if row["limits"].startswith("none"):
            continue
        per_day = sum(v for v in row["raises_per_day"].values() if v is not None)
        lines.append(
            f"{name:<16} {row['samples_read']:>9,} {row['samples_used']:>9,} "
            f"{row['samples_read'] - row['samples_used']:>9,}  "
            + " ".join(f"{row['raises'][d]:>9}" for d in detectors)
            + f"  {per_day:>10.2f}  {row['first_raise'] or '-'}"
        )
    totals = summary["totals"]
    lines.append("")
    lines.append(f"{totals['tags']} tags, {totals['samples_read']:,} samples read, {totals['samples_used']:,} used; "
                 f"{totals['events']} events; limits {summary['limits_version']}")  # fmt: skip
    if totals["excluded"]:
        lines.append("excluded by reason: " + ", ".join(f"{k} {v:,}" for k, v in totals["excluded"].items()))
    skipped = totals["rows_skipped_by_reader"]
    if skipped.get("counts"):
        lines.append("rows skipped by the reader: " + ", ".join(f"{k} {v:,}" for k, v in skipped["counts"].items()))
        for reason, examples in skipped.get("examples", {}).items():
            for example in examples[:3]:
                lines.append(f"  {reason}: {example}")
    if summary["tags_without_limits"]:
        names = summary["tags_without_limits"]
        more = " ..." if len(names) > 20 else ""
        lines.append(f"skipped, no limits ({len(names)}): " + ", ".join(names[:20]) + more)
    return "\n".join(lines)
