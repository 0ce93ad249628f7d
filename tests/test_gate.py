"""The quality gate: what never reaches the detectors, how it is counted, and which events it raises."""

from __future__ import annotations

import numpy as np

from streamguard.gate import REASONS
from streamguard.pipeline import Pipeline
from streamguard.types import BAD, GOOD, UNCERTAIN, Batch

from .helpers import SECOND, make_config


def _pipeline(**tag_settings: object) -> Pipeline:
    pipeline = Pipeline(make_config({"cusum": {"h": 4.0}}, dict(tag_settings)))
    pipeline.tags.lookup(["T0"])
    return pipeline


def _batch(values: list[float], seconds: list[int] | None = None, quality: list[int] | None = None) -> Batch:
    n = len(values)
    secs = seconds if seconds is not None else list(range(1, n + 1))
    return Batch.of(np.zeros(n, np.int32), np.array(secs) * SECOND, values, quality)


def _excluded(pipeline: Pipeline) -> dict[str, int]:
    row = pipeline.counters.samples[0]
    return {REASONS[r]: int(row[r]) for r in range(len(REASONS)) if row[r]}


def test_bad_nan_inf_and_uncertain_never_update_detectors() -> None:
    """Bad quality, NaN, +-inf and (by default) uncertain samples are counted per reason and ignored."""
    pipeline = _pipeline()
    values = [50.0, np.nan, np.inf, -np.inf, 60.0, 0.0]
    quality = [BAD, GOOD, GOOD, GOOD, UNCERTAIN, GOOD]
    pipeline.process(_batch(values, quality=quality))
    assert _excluded(pipeline) == {"accepted": 1, "bad_quality": 1, "not_finite": 3, "uncertain_quality": 1}
    assert pipeline.detector_state["cusum"].upper[0] == 0.0


def test_uncertain_can_be_used_per_tag() -> None:
    """`uncertain: use` lets uncertain samples through for that tag."""
    pipeline = _pipeline(uncertain="use")
    pipeline.process(_batch([1.0, 2.0], quality=[UNCERTAIN, UNCERTAIN]))
    assert _excluded(pipeline) == {"accepted": 2}


def test_out_of_order_and_duplicate_timestamps_are_dropped_not_reordered() -> None:
    """A sample older than the newest seen is dropped and counted; an equal timestamp is a duplicate."""
    pipeline = _pipeline()
    pipeline.process(_batch([0.0, 0.1, 0.2, 0.3], seconds=[10, 12, 11, 12]))
    assert _excluded(pipeline) == {"accepted": 2, "out_of_order": 1, "duplicate": 1}


def test_out_of_range_raises_one_event_and_an_end() -> None:
    """Values outside `range` are excluded; one range event on entry, one range_end on return."""
    pipeline = _pipeline(range=[-5.0, 5.0])
    events = pipeline.process(_batch([0.0, 9.0, 9.5, -7.0, 0.0]))
    kinds = [(e.kind, e.direction) for e in events]
    assert kinds == [("range", "up"), ("range_end", "none")]
    assert _excluded(pipeline)["out_of_range"] == 3
    assert all(e.detector == "quality" for e in events)


def test_stuck_transmitter_raises_stale_and_is_excluded() -> None:
    """`stale_after: N` identical values raise a stale event; further repeats never reach the detectors."""
    pipeline = _pipeline(stale_after=4)
    events = pipeline.process(_batch([0.5, 0.3, 0.3, 0.3, 0.3, 0.3, 0.3, 0.1]))
    assert [e.kind for e in events] == ["stale", "stale_end"]
    assert _excluded(pipeline)["stale"] == 3
    assert [e for e in events if e.detector != "quality"] == []


def test_gap_raises_event_and_restarts_statistics() -> None:
    """A gap longer than max_gap raises a gap event and restarts the CUSUM (no statistic spans a gap)."""
    pipeline = _pipeline(max_gap="10s")
    pipeline.process(_batch([2.0, 2.0], seconds=[1, 2]))
    assert pipeline.detector_state["cusum"].upper[0] == 3.0
    events = pipeline.process(_batch([0.5], seconds=[100]))
    assert [e.kind for e in events] == ["gap"] and events[0].statistic == 98.0
    assert pipeline.detector_state["cusum"].upper[0] == 0.0  # restarted, then 0.5 - k = 0


def test_tag_without_limits_is_counted_and_skipped() -> None:
    """A tag with no baseline in config or limits file is counted as no_limits and never charted."""
    from streamguard.config import parse_config

    pipeline = Pipeline(parse_config({"detectors": {"cusum": {}}}))
    pipeline.tags.lookup(["NEW-1"])
    events = pipeline.process(_batch([100.0, 100.0, 100.0]))
    assert events == [] and _excluded(pipeline) == {"no_limits": 3}
    assert pipeline.tags.unconfigured() == ["NEW-1"]
