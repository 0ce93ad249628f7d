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

from ..arrays import Columns
from . import Signals

MOVING_RANGE = 1
STANDARD_DEVIATION = 2

_D2_2 = 2.0 / math.sqrt(math.pi)  # mean range of two standard normals
_D3_2 = math.sqrt(2.0 - 4.0 / math.pi)  # its standard deviation


class SpreadParams(Columns):
    spec = {"limit": (np.float64, (), 3.0)}


class SpreadState(Columns):
    spec = {"previous": (np.float64, (), np.nan)}


@njit(cache=True)
def _c4(n):
    return math.sqrt(2.0 / (n - 1.0)) * math.exp(math.lgamma(n / 2.0) - math.lgamma((n - 1.0) / 2.0))


@njit(cache=True)
def spread_kernel(tag, mean, sd, n, sigma, restart, limit, previous,
                  out_code, out_direction, out_statistic, out_limit):  # fmt: skip
    for i in range(tag.shape[0]):
        t = tag[i]
        out_code[i] = 0
        out_direction[i] = 0
        if restart[i]:
            previous[t] = np.nan
        if n[i] == 1:
            if np.isnan(previous[t]):
                out_statistic[i] = np.nan
                out_limit[i] = np.nan
            else:
                w = abs(mean[i] - previous[t]) / sigma[t]
                upper = _D2_2 + limit[t] * _D3_2
                out_statistic[i] = w
                out_limit[i] = upper
                if w > upper:
                    out_code[i] = MOVING_RANGE
                    out_direction[i] = 1
            previous[t] = mean[i]
        else:
            previous[t] = np.nan
            c4 = _c4(n[i])
            half_width = limit[t] * math.sqrt(1.0 - c4 * c4)
            w = sd[i] / sigma[t]
            out_statistic[i] = w
            if w > c4 + half_width:
                out_code[i] = STANDARD_DEVIATION
                out_direction[i] = 1
                out_limit[i] = c4 + half_width
            elif c4 - half_width > 0 and w < c4 - half_width:
                out_code[i] = STANDARD_DEVIATION
                out_direction[i] = -1
                out_limit[i] = c4 - half_width
            else:
                out_limit[i] = c4 + half_width


def run_spread(tag: np.ndarray, mean: np.ndarray, sd: np.ndarray, n: np.ndarray, sigma: np.ndarray,
               restart: np.ndarray, params: SpreadParams, state: SpreadState) -> Signals:  # fmt: skip
    out = Signals.empty(tag.shape[0])
    spread_kernel(tag, mean, sd, n, sigma, restart, params.limit, state.previous,
                  out.code, out.direction, out.statistic, out.limit)  # fmt: skip
    return out
