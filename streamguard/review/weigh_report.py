"""The side-by-side report: the settings weighed, the overall table, incidents, tags, and pictures.

Same page, palette and rules as the replay report (``html``): self-contained, printable in grey. The
numbers come from ``side_by_side``; this module only lays them out.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from .. import __version__
from ..durations import format_duration
from ..timeparse import format_time
from . import figures
from .html import Section, facts, figure, page, paragraph, table
from .side_by_side import Contender, Standing, incident_rows, overall_rows, tag_rows


def _settings_text(contender: Contender) -> str:
    parts = []
    for name, params in contender.config.detectors.enabled().items():
        values = ", ".join(f"{k} {list(v) if isinstance(v, tuple) else v}"
                           for k, v in params.model_dump(by_alias=True).items())  # fmt: skip
        parts.append(f"{name}: {values}")
    parts.append(f"clear after {contender.config.alarms.clear_after}")
    return "; ".join(parts)


def build_weigh_report(contenders: Sequence[Contender], standings: Sequence[Standing], start_ns: int, end_ns: int,
                       max_tags: int = 25) -> str:  # fmt: skip
    labels = [s.label for s in standings]
    first = standings[0].result.summary["totals"]

    weighed = Section("settings", "Settings weighed")
    weighed.add(facts([
        (format_duration(end_ns - start_ns) if end_ns > start_ns else "-", "period replayed"),
        (f"{first['tags']:,}", "tags seen"),
        (f"{first['samples_read']:,}", "samples read, once, for every setting"),
        (str(len(contenders)), "settings"),
    ]))  # fmt: skip
    weighed.add(table(["setting", "config", "detectors and alarm state (defaults; tags may override)"],
                      [(c.label, c.source or "-", _settings_text(c)) for c in contenders]))  # fmt: skip

    overall = Section("overall", "Overall")
    overall.add(table(["", *labels], [(measure, *values) for measure, values in overall_rows(standings)]))
    series = [(s.label, s.load.window_start_ns, s.load.window_counts) for s in standings]
    overall.add(figure(figures.rate_comparison_figure(series, standings[0].load.settings.flood_above),
                       "Alarms counted in clock-aligned 10-minute windows; the dashed line is the flood threshold."))

    sections = [weighed, overall]
    incidents = incident_rows(standings)
    if incidents:
        part = Section("incidents", "Known incidents")
        part.add(paragraph("Each cell: the delay from the incident's onset to the first raise of any process "
                           "detector on its tag inside the incident window, and which detector raised.", "note"))
        part.add(table(["tag", "incident", *labels], incidents))
        scores = standings[0].scores
        assert scores is not None
        scored = [i for i, status in enumerate(scores.status) if status == "scored"]
        names = [f"{scores.incidents[i].tag}  {scores.incidents[i].label}" for i in scored]
        delays = [[(found[1] if (found := s.detection(i)) is not None else None) for s in standings] for i in scored]
        svg = figures.delay_comparison_figure(names, labels, delays)
        if svg:
            part.add(figure(svg, "Delay to the first raise (log scale); hollow marks at the right: missed."))
        sections.append(part)

    rows = tag_rows(standings)
    tags_part = Section("tags", "Per tag")
    if rows:
        with_false = standings[0].scores is not None
        header = ["tag", *(f"{label} raises" for label in labels)]
        if with_false:
            header += [f"{label} false alarms" for label in labels]
        tags_part.add(table(header, rows))
        top = rows[:max_tags]
        matrix = np.array([[row[1 + k] for k in range(len(labels))] for row in top], dtype=np.float64)
        tags_part.add(figure(figures.tag_comparison_figure([row[0] for row in top], labels, matrix),
                             f"The {len(top)} tags with the most raises under any setting."))  # fmt: skip
    else:
        tags_part.add(paragraph("No setting raised an alarm.", "note"))
    sections.append(tags_part)

    reading = Section("reading", "How to read this comparison")
    reading.add(paragraph(
        "Every setting saw the same samples in the same order, through the same pipeline the live service runs. "
        "Raises are process alarms (data-quality notices aside) after the clear-after hysteresis. With an "
        "incidents file, a false alarm is a raise outside every incident window of its tag, and an incident is "
        "detected when any process detector raises on its tag inside its window.", "note"))  # fmt: skip
    sections.append(reading)
    subtitle = [f"{format_time(start_ns)} — {format_time(end_ns)}", " · ".join(labels)]
    return page("Settings side by side", subtitle, sections, f"streamguard {__version__} · settings side by side · "
                "self-contained: no scripts, fonts or images are fetched")  # fmt: skip
