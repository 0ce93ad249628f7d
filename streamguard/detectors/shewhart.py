"""Shewhart chart with the Western Electric and Nelson run rules.

Method: Shewhart (1931) limits at ``limit`` standard errors; run rules from the Western Electric
Statistical Quality Control Handbook (1956) and Nelson, "The Shewhart control chart — tests for
special causes", J. Quality Technology 16 (1984). Rule 1 alone is slow for small shifts but has the
longest in-control run (ARL 370.4 at 3 sigma); each added rule buys sensitivity with false alarms
(rules 1-4 together: ARL 91.75, Champ & Woodall 1987). The chart's history restarts after a signal
and after a gap, so a rule never spans either.

Rules are evaluated on standardized points z. Zone thresholds of rules 2-4 and Nelson 5-8 are the
published 1 and 2 standard errors; ``limit`` moves only rule 1. ``run_length`` sets the same-side run
of we4 (published: 8); nelson2 keeps its published 9.

>>> import numpy as np
>>> from streamguard.detectors.shewhart import rule_mask
>>> rule_mask(("we1", "we4")) == (1 << 0) | (1 << 3)
True
"""

from __future__ import annotations

import numpy as np
from numba import njit

from ..arrays import Columns
from ..config import RULE_NAMES
from . import Signals

# Rule codes: position in RULE_NAMES + 1 (0 means "no signal").
WE1, WE2, WE3, WE4 = 1, 2, 3, 4
N1, N2, N3, N4, N5, N6, N7, N8 = 5, 6, 7, 8, 9, 10, 11, 12
RULE_CODES = {name: i + 1 for i, name in enumerate(RULE_NAMES)}


def rule_mask(rules: tuple[str, ...]) -> int:
    mask = 0
    for name in rules:
        mask |= 1 << (RULE_CODES[name] - 1)
    return mask


def rule_order(rules: tuple[str, ...], width: int = 12) -> np.ndarray:
    """Rule codes in the order the config lists them (first listed wins a tie), zero-padded."""
    order = np.zeros(width, np.int8)
    for i, name in enumerate(rules):
        order[i] = RULE_CODES[name]
    return order


class ShewhartParams(Columns):
    spec = {
        "limit": (np.float64, (), 3.0),
        "order": (np.int8, (12,), 0),
        "run_length": (np.int32, (), 8),
    }


class ShewhartState(Columns):
    # Bit histories of the last points' zones (bit 0 = newest) and run counters: tiny and exact.
    spec = {
        "above2": (np.uint8, (), 0),
        "below2": (np.uint8, (), 0),
        "above1": (np.uint8, (), 0),
        "below1": (np.uint8, (), 0),
        "side_run": (np.int32, (), 0),  # +n: n points above centre in a row, -n below
        "trend_run": (np.int32, (), 0),  # +n: n rises in a row, -n falls
        "alternating_run": (np.int32, (), 0),  # differences alternating in sign, in a row
        "last_difference": (np.int8, (), 0),
        "inner_run": (np.int32, (), 0),  # points with |z| < 1 in a row
        "outer_run": (np.int32, (), 0),  # points with |z| > 1 in a row
        "previous": (np.float64, (), np.nan),
        "seen": (np.int32, (), 0),
    }


@njit(cache=True, inline="always")
def _bits(x):
    c = 0
    while x:
        c += x & 1
        x >>= 1
    return c


@njit(cache=True)
def _clear(t, above2, below2, above1, below1, side_run, trend_run, alternating_run, last_difference,
           inner_run, outer_run, previous, seen):  # fmt: skip
    above2[t] = 0
    below2[t] = 0
    above1[t] = 0
    below1[t] = 0
    side_run[t] = 0
    trend_run[t] = 0
    alternating_run[t] = 0
    last_difference[t] = 0
    inner_run[t] = 0
    outer_run[t] = 0
    previous[t] = np.nan
    seen[t] = 0


@njit(cache=True)
def shewhart_kernel(
    tag, z, restart,
    limit, order, run_length,
    above2, below2, above1, below1, side_run, trend_run, alternating_run, last_difference,
    inner_run, outer_run, previous, seen,
    out_code, out_direction, out_statistic, out_limit,
):  # fmt: skip
    for i in range(tag.shape[0]):
        t = tag[i]
        x = z[i]
        if restart[i]:
            _clear(t, above2, below2, above1, below1, side_run, trend_run, alternating_run,
                   last_difference, inner_run, outer_run, previous, seen)  # fmt: skip
        # Update the histories with this point.
        above2[t] = ((above2[t] << 1) | (1 if x > 2.0 else 0)) & 0x1F
        below2[t] = ((below2[t] << 1) | (1 if x < -2.0 else 0)) & 0x1F
        above1[t] = ((above1[t] << 1) | (1 if x > 1.0 else 0)) & 0x1F
        below1[t] = ((below1[t] << 1) | (1 if x < -1.0 else 0)) & 0x1F
        if x > 0:
            side_run[t] = side_run[t] + 1 if side_run[t] > 0 else 1
        elif x < 0:
            side_run[t] = side_run[t] - 1 if side_run[t] < 0 else -1
        else:
            side_run[t] = 0
        if seen[t] > 0:
            d = x - previous[t]
            sign = 1 if d > 0 else (-1 if d < 0 else 0)
            if sign > 0:
                trend_run[t] = trend_run[t] + 1 if trend_run[t] > 0 else 1
            elif sign < 0:
                trend_run[t] = trend_run[t] - 1 if trend_run[t] < 0 else -1
            else:
                trend_run[t] = 0
            if sign != 0 and sign == -last_difference[t]:
                alternating_run[t] += 1
            elif sign != 0:
                alternating_run[t] = 1
            else:
                alternating_run[t] = 0
            last_difference[t] = sign
        previous[t] = x
        seen[t] += 1
        inner_run[t] = inner_run[t] + 1 if abs(x) < 1.0 else 0
        outer_run[t] = outer_run[t] + 1 if abs(x) > 1.0 else 0

        code = 0
        direction = 0
        threshold = 0.0
        for j in range(order.shape[1]):
            rule = order[t, j]
            if rule == 0:
                break
            if rule == WE1 or rule == N1:
                if abs(x) > limit[t]:
                    code, direction, threshold = rule, (1 if x > 0 else -1), limit[t]
            elif rule == WE2 or rule == N5:
                if _bits(above2[t] & 0x7) >= 2:
                    code, direction, threshold = rule, 1, 2.0
                elif _bits(below2[t] & 0x7) >= 2:
                    code, direction, threshold = rule, -1, 2.0
            elif rule == WE3 or rule == N6:
                if _bits(above1[t] & 0x1F) >= 4:
                    code, direction, threshold = rule, 1, 1.0
                elif _bits(below1[t] & 0x1F) >= 4:
                    code, direction, threshold = rule, -1, 1.0
            elif rule == WE4 or rule == N2:
                need = run_length[t] if rule == WE4 else 9
                if side_run[t] >= need:
                    code, direction, threshold = rule, 1, 0.0
                elif side_run[t] <= -need:
                    code, direction, threshold = rule, -1, 0.0
            elif rule == N3:
                if trend_run[t] >= 5:
                    code, direction, threshold = rule, 1, 0.0
                elif trend_run[t] <= -5:
                    code, direction, threshold = rule, -1, 0.0
            elif rule == N4:
                if alternating_run[t] >= 13:
                    code, direction, threshold = rule, 0, 0.0
            elif rule == N7:
                if inner_run[t] >= 15:
                    code, direction, threshold = rule, 0, 1.0
            elif rule == N8:
                if outer_run[t] >= 8:
                    code, direction, threshold = rule, 0, 1.0
            if code != 0:
                break
        out_code[i] = code
        out_direction[i] = direction
        out_statistic[i] = x
        out_limit[i] = threshold if code != 0 else limit[t]
        if code != 0:
            _clear(t, above2, below2, above1, below1, side_run, trend_run, alternating_run,
                   last_difference, inner_run, outer_run, previous, seen)  # fmt: skip


def run_shewhart(tag: np.ndarray, z: np.ndarray, restart: np.ndarray, params: ShewhartParams,
                 state: ShewhartState) -> Signals:  # fmt: skip
    out = Signals.empty(tag.shape[0])
    shewhart_kernel(
        tag, z, restart, params.limit, params.order, params.run_length,
        state.above2, state.below2, state.above1, state.below1, state.side_run, state.trend_run,
        state.alternating_run, state.last_difference, state.inner_run, state.outer_run,
        state.previous, state.seen,
        out.code, out.direction, out.statistic, out.limit,
    )  # fmt: skip
    return out
