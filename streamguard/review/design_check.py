"""Observed raises per tag set beside what the detector's design promised for an in-control process.

The designed interval between false alarms is the detector's in-control average run length (ARL, in
charted points) times the time one point takes; ``streamguard.expected_rates`` computes both (the
run-length engine for Shewhart, CUSUM and EWMA, normal theory for the spread chart), and this module
uses it for every monitored tag, whether its limits come from the limits file or from the config. A
tag that raised far more often than designed is not in control as the design assumed (a real change,
autocorrelation, a sigma estimated too small); one that stayed silent through far more than its
designed interval may have limits estimated too wide. The flag is the Poisson tail of the raises
expected over the tag's span, on either side, below ``alpha``. Raises are counted after the alarm
hysteresis (``clear_after``), so a long real change is one raise.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from ..config import DETECTOR_NAMES
from ..durations import format_duration
from ..errors import StreamguardError
from ..pipeline import Pipeline

DAY_NS = 86400 * 10**9
FLAG_P_VALUE = 1e-3  # far outside the design on either side: a Poisson tail this improbable is flagged


@dataclass(frozen=True)
class DesignRow:
    tag: str
    detector: str
    points: int
    span_ns: int
    raises: int
    arl_points: float | None  # None: the run-length engine is not available
    point_period_ns: float | None
    flag: str  # "", "more than designed", "fewer than designed"

    @property
    def raises_per_day(self) -> float | None:
        return self.raises / (self.span_ns / DAY_NS) if self.span_ns > 0 else None

    @property
    def designed_interval_ns(self) -> float | None:
        if self.arl_points is None or self.point_period_ns is None:
            return None
        return self.arl_points * self.point_period_ns

    @property
    def expected_raises(self) -> float | None:
        interval = self.designed_interval_ns
        return self.span_ns / interval if interval else None

    def to_dict(self) -> dict[str, Any]:
        interval = self.designed_interval_ns
        return {
            "tag": self.tag, "detector": self.detector, "points": self.points, "raises": self.raises,
            "raises_per_day": self.raises_per_day, "in_control_arl_points": self.arl_points,
            "designed_interval": format_duration(interval) if interval else None,
            "designed_raises_per_day": DAY_NS / interval if interval else None,
            "expected_raises": self.expected_raises, "flag": self.flag or None,
        }  # fmt: skip


ArlOf = Callable[[str, Any, float], float]


def _arl_function() -> ArlOf | None:
    """In-control ARL of a detector setting (points), or None where the design modules are absent."""
    try:
        from ..design.engine import arl
        from ..expected_rates import spread_arl
    except ImportError:
        return None
    cache: dict[tuple[Any, ...], float] = {}

    def arl_of(detector: str, params: Any, subgroup_size: float) -> float:
        data = params.model_dump(by_alias=True)
        key = (detector, subgroup_size if detector == "spread" else 0,
               *sorted((k, tuple(v) if isinstance(v, list | tuple) else v) for k, v in data.items()))  # fmt: skip
        if key not in cache:
            cache[key] = float(spread_arl(params.limit, subgroup_size) if detector == "spread" else arl(detector, data))
        return cache[key]

    return arl_of


def _point_period_ns(pipeline: Pipeline, t: int, span_ns: int) -> float | None:
    """The time one point takes: the subgroup window, or sample period x size (limits file, else observed)."""
    settings = pipeline.tags.settings[t]
    if settings.subgroup.window:
        return float(settings.subgroup.window_ns)
    found = pipeline.tags.limits.tags.get(settings.name) if pipeline.tags.limits is not None else None
    sample_period_s = found.sample_period_s if found is not None else None
    if sample_period_s:
        return sample_period_s * 1e9 * settings.subgroup.count
    samples = int(pipeline.counters.samples[t].sum())
    return span_ns / (samples - 1) * settings.subgroup.count if samples > 1 and span_ns > 0 else None


def design_rows(pipeline: Pipeline, alpha: float = FLAG_P_VALUE) -> list[DesignRow]:
    """One row per monitored tag and detector that ran."""
    from scipy.stats import poisson

    arl_of = _arl_function()
    tags = pipeline.tags
    n = len(tags)
    counters = pipeline.counters
    first, last = pipeline.gate_state.first_ts[:n], pipeline.gate_state.last_ts[:n]
    rows = []
    for t, name in enumerate(tags.names):
        if not tags.limit_source[t]:
            continue
        points = int(counters.points[t])
        span = max(int(last[t]) - int(first[t]), 0)
        period = _point_period_ns(pipeline, t, span)
        found = tags.limits.tags.get(name) if tags.limits is not None else None
        subgroup_size = found.subgroup_size if found is not None else float(tags.settings[t].subgroup.count)
        for detector in pipeline.detectors:
            arl_points = None
            if arl_of is not None:
                try:
                    arl_points = arl_of(detector, tags.settings[t].detectors[detector], subgroup_size)
                except StreamguardError:  # a setting the engine declines: "-" rather than no review
                    arl_points = None
            raises = int(counters.raises[t, DETECTOR_NAMES.index(detector)])
            row = DesignRow(name, detector, points, span, raises, arl_points, period, "")
            expected = row.expected_raises
            if expected:
                if raises > expected and poisson.sf(raises - 1, expected) < alpha:
                    row = DesignRow(name, detector, points, span, raises, arl_points, period, "more than designed")
                elif raises < expected and poisson.cdf(raises, expected) < alpha:
                    row = DesignRow(name, detector, points, span, raises, arl_points, period, "fewer than designed")
            rows.append(row)
    return rows
