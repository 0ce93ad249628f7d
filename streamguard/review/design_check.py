"""Observed raises per tag set beside what the detector's design promised for an in-control process.

The run-length engine (``streamguard.design``) gives each detector's in-control average run length
(ARL) in charted points; times the tag's point period it is the designed interval between false
alarms. A tag that raised far more often than that is not in control as the design assumed (a real
change, autocorrelation, a sigma estimated too small); one that never raised in far more than its
designed interval may have limits estimated too wide. The flag uses the Poisson tail of the number of
raises expected from the design over the points charted: below ``alpha`` on either side disagrees.
Raises are counted after the alarm hysteresis (``clear_after``), so a long real change is one raise.
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


@dataclass(frozen=True)
class DesignRow:
    tag: str
    detector: str
    points: int
    span_ns: int
    raises: int
    arl_points: float | None  # None: no run-length engine, or none for this detector
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
        return self.points / self.arl_points if self.arl_points else None

    def to_dict(self) -> dict[str, Any]:
        interval = self.designed_interval_ns
        return {
            "tag": self.tag, "detector": self.detector, "points": self.points, "raises": self.raises,
            "raises_per_day": self.raises_per_day, "in_control_arl_points": self.arl_points,
            "designed_interval": format_duration(interval) if interval else None,
            "designed_raises_per_day": DAY_NS / interval if interval else None,
            "expected_raises": self.expected_raises, "flag": self.flag or None,
        }  # fmt: skip


ArlFunction = Callable[..., float]


def _engine() -> tuple[ArlFunction | None, tuple[str, ...]]:
    """The run-length engine's ARL function and the detectors it covers, or nothing if it is absent."""
    try:
        from ..design import DETECTORS, arl
    except ImportError:
        return None, ()
    return arl, tuple(DETECTORS)


def _params_key(detector: str, params: Any) -> tuple[Any, ...]:
    data = params.model_dump(by_alias=True)
    return (detector, *sorted((k, tuple(v) if isinstance(v, list | tuple) else v) for k, v in data.items()))


def design_rows(pipeline: Pipeline, alpha: float = 1e-3) -> list[DesignRow]:
    """One row per monitored tag and detector that ran; ARLs computed once per distinct setting."""
    from scipy.stats import poisson

    arl, covered = _engine()
    cache: dict[tuple[Any, ...], float | None] = {}
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
        period = span / (points - 1) if points > 1 else None
        for detector in pipeline.detectors:
            params = tags.settings[t].detectors[detector]
            key = _params_key(detector, params)
            if key not in cache:
                cache[key] = _arl_of(arl, detector, params) if detector in covered else None
            arl_points = cache[key]
            raises = int(counters.raises[t, DETECTOR_NAMES.index(detector)])
            flag = ""
            if arl_points and points:
                expected = points / arl_points
                if raises > expected and poisson.sf(raises - 1, expected) < alpha:
                    flag = "more than designed"
                elif raises < expected and poisson.cdf(raises, expected) < alpha:
                    flag = "fewer than designed"
            rows.append(DesignRow(name, detector, points, span, raises, arl_points, period, flag))
    return rows


def _arl_of(arl: ArlFunction | None, detector: str, params: Any) -> float | None:
    if arl is None:
        return None
    try:
        return float(arl(detector, params.model_dump(by_alias=True)))
    except StreamguardError:  # a setting the engine declines: shown as "-" rather than stopping the review
        return None
