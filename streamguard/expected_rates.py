"""What each tag's settings promise: the designed in-control alarm interval in time.

A run length is counted in charted points, but a plant lives in hours: the same ARL of 370 is a false
alarm every six minutes on a 1 Hz individuals chart and every six hours on one-minute subgroups. Here the
run-length engine's in-control ARL is multiplied by the time one point takes (sample period x subgroup
size, or the window). ``review.design_check`` sets a replay's observed raises beside it.
"""

from __future__ import annotations

import math
from functools import lru_cache
from typing import Any

from scipy import stats

from . import constants
from .config import Config, resolve_tag
from .durations import format_duration
from .limits import LimitsFile

_D2_2 = 2.0 / math.sqrt(math.pi)
_D3_2 = math.sqrt(2.0 - 4.0 / math.pi)


def _freeze(params: dict[str, Any]) -> tuple[tuple[str, Any], ...]:
    return tuple(sorted((k, tuple(v) if isinstance(v, list | tuple) else v) for k, v in params.items()))


@lru_cache(maxsize=256)
def _engine_arl(detector: str, frozen: tuple[tuple[str, Any], ...]) -> float:
    from .design.engine import arl

    return float(arl(detector, {k: list(v) if isinstance(v, tuple) else v for k, v in frozen}))


def spread_arl(limit: float, n: float) -> float:
    """In-control ARL of the spread chart from the normal-theory distribution of its statistic.

    S with n >= 2: (n - 1) s^2 / sigma^2 is chi-square with n - 1 degrees of freedom. Moving range: the
    range of two normals, P(MR > (d2 + L d3) sigma) = 2 (1 - Phi(limit_mr / sqrt 2)); consecutive moving
    ranges overlap, so this point-wise ARL is an approximation (the true one is somewhat longer).
    """
    if n < 1.5:
        upper = _D2_2 + limit * _D3_2
        return 1.0 / (2.0 * stats.norm.sf(upper / math.sqrt(2.0)))
    m = int(round(n))
    c4 = constants.c4(m)
    half = limit * math.sqrt(1 - c4 * c4)
    p = stats.chi2.sf((m - 1) * (c4 + half) ** 2, m - 1)
    if c4 - half > 0:
        p += stats.chi2.cdf((m - 1) * (c4 - half) ** 2, m - 1)
    return 1.0 / p


def point_period_s(config: Config, tag: str, sample_period_s: float | None) -> float | None:
    """Seconds one charted point takes for this tag."""
    subgroup = resolve_tag(config, tag).subgroup
    if subgroup.window:
        return subgroup.window_ns / 1e9
    if sample_period_s is None:
        return None
    return sample_period_s * subgroup.count


def designed_intervals(config: Config, limits: LimitsFile | None) -> list[dict[str, Any]]:
    """Per tag in the limits file and detector: in-control ARL (points) and the designed interval (time)."""
    rows: list[dict[str, Any]] = []
    if limits is None:
        return rows
    for tag, tag_limits in limits.tags.items():
        settings = resolve_tag(config, tag)
        period = point_period_s(config, tag, tag_limits.sample_period_s)
        for name, params in settings.detectors.items():
            if name == "spread":
                arl = spread_arl(params.limit, tag_limits.subgroup_size)
            else:
                arl = _engine_arl(name, _freeze(params.model_dump(by_alias=True)))
            interval = arl * period if period else None
            rows.append({
                "tag": tag, "detector": name, "arl": arl,
                "period": format_duration(period * 1e9) if period else "?",
                "interval_s": interval,
                "interval": format_duration(interval * 1e9) if interval else "unknown (no sample period)",
            })  # fmt: skip
    return rows
