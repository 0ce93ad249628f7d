"""Replay review: what a month of history says about a detector setting before it goes live.

Sits after ``replay``: it takes the replay's events, counters and summary and adds the alarm load
against the alarm-management benchmarks (``alarm_load``), each tag's raises against its design
(``design_check``), detection of known incidents (``incidents``) and a self-contained HTML report
with figures (``report``, ``figures``, ``html``). ``side_by_side`` and ``commands`` replay several
settings on the same data in one pass. matplotlib is needed only when a report is written.

    lines = review_replay(result, config, report_path="review.html", incidents_path="incidents.csv")
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from ..config import Config
    from ..replay import ReplayResult
    from .replay_review import ReviewSettings

__all__ = ["review_replay"]


def review_replay(result: ReplayResult, config: Config, *, report_path: str | Path | None = None,
                  incidents_path: str | Path | None = None, settings: ReviewSettings | None = None,
                  show_progress: bool | None = None) -> list[str]:  # fmt: skip
    """Add the review's sections to ``result.summary``, write the report if asked; returns lines to print.

    Imported lazily so that loading the command line (which registers ``weigh`` from this package)
    costs nothing until a review is asked for.
    """
    from .replay_review import review_replay as run

    return run(result, config, report_path=report_path, incidents_path=incidents_path, settings=settings,
               show_progress=show_progress)  # fmt: skip
