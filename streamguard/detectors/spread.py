"""Spread (dispersion) chart: moving range for individuals, S for subgroups.

Methods: the moving-range chart of individuals (limits D3, D4 from d2(2), d3(2)) and the S chart with
c4(n) (Montgomery, Introduction to Statistical Quality Control, ch. 6; constants as in ASTM E2587),
both with the frozen phase-I sigma rather than limits re-estimated from the monitored data. A rise in
spread often comes before a shift in level (a failing transmitter, a loose valve), and a drop to nothing
is a stuck signal; this chart watches what the level charts assume constant.

Statistics are in units of the individual sigma: |x_i - x_(i-1)| / sigma for individuals, s / sigma
for a subgroup of n >= 2. Limits: centre d2(2) = 2/sqrt(pi) with upper d2 + L d3 for the moving range
(its lower limit is zero); c4(n) -+ L sqrt(1 - c4(n)^2) for S, so variable n is handled point by point.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from ..alarms import AlarmState, DetectorOutput, alarm_step, run_detector
from ..arrays import Columns

MOVING_RANGE = 1
STANDARD_DEVIATION = 2

_D2_2 = 2.0 / math.sqrt(math.pi)  # mean range of two standard normals
_D3_2 = math.sqrt(2.0 - 4.0 / math.pi)  # its standard deviation


class SpreadParams(Columns):
    spec = {"limit": (np.float64, (), 3.0)}


class SpreadState(Columns):
    spec = {"previous": (np.float64, (), np.nan)}


@njit(cache=True, nogil=True)
def _c4(n):
    return math.sqrt(2.0 / (n - 1.0)) * math.exp(math.lgamma(n / 2.0) - math.lgamma((n - 1.0) / 2.0))


@njit(cache=True, nogil=True)
def spread_kernel(start, tag, mean, sd, n_in, sigma, restart, limit, previous,
                  clear_after, alarm, ev_int, ev_float, trace, tr_int, tr_float):  # fmt: skip
    n = tag.shape[0]
    capacity = ev_int.shape[0]
    m = 0
    i = start
    while i < n and m < capacity:
        t = tag[i]
        code = 0
        direction = 0
        statistic = np.nan
        bound = np.nan
        if restart[i]:
            previous[t] = np.nan
        if n_in[i] == 1:
            if not np.isnan(previous[t]):
                statistic = abs(mean[i] - previous[t]) / sigma[t]
                bound = _D2_2 + limit[t] * _D3_2
                if statistic > bound:
                    code = MOVING_RANGE
                    direction = 1
            previous[t] = mean[i]
        else:
            previous[t] = np.nan
            c4 = _c4(n_in[i])
            half_width = limit[t] * math.sqrt(1.0 - c4 * c4)
            statistic = sd[i] / sigma[t]
            bound = c4 + half_width
            if statistic > bound:
                code = STANDARD_DEVIATION
                direction = 1
            elif c4 - half_width > 0 and statistic < c4 - half_width:
                code = STANDARD_DEVIATION
                direction = -1
                bound = c4 - half_width
        if code != 0 or alarm[t, 0] != 0:
            m = alarm_step(t, i, code, direction, statistic, bound, clear_after, alarm, ev_int, ev_float, m)
        if trace:
            tr_int[i, 0] = code
            tr_int[i, 1] = direction
            tr_float[i, 0] = statistic
            tr_float[i, 1] = bound
        i += 1
    return i, m


def run_spread(tag: np.ndarray, mean: np.ndarray, sd: np.ndarray, n: np.ndarray, sigma: np.ndarray,
               restart: np.ndarray, params: SpreadParams, state: SpreadState, alarm: AlarmState | None = None,
               clear_after: int = 1, trace: bool = False) -> DetectorOutput:  # fmt: skip
    def call(start, *rest):
        return spread_kernel(start, tag, mean, sd, n, sigma, restart, params.limit, state.previous, *rest)

    return run_detector(call, tag.shape[0], clear_after, alarm or AlarmState(state.capacity), trace)
