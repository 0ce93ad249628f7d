"""Shewhart chart with the Western Electric and Nelson run rules.

Method: Shewhart (1931) limits at ``limit`` standard errors; run rules from the Western Electric
Statistical Quality Control Handbook (1956) and Nelson, "The Shewhart control chart - tests for
special causes", J. Quality Technology 16 (1984). Rule 1 alone is slow for small shifts but has the
longest in-control run (ARL 370.4 at 3 sigma); each added rule buys sensitivity with false alarms
(rules 1-4 together: ARL 91.75, Champ & Woodall 1987). The chart's history restarts after a signal
and after a gap, so a rule never spans either.

Rules are evaluated on standardized points z. Zone thresholds of rules 2-4 and Nelson 5-8 are the
published 1 and 2 standard errors; ``limit`` moves only rule 1. ``run_length`` sets the same-side run
of we4 (published: 8); nelson2 keeps its published 9. When several rules fire on one point, the one
listed first in the config is reported.

The recent history is kept as bit masks of zone membership (bit 0 = newest point) and run counters,
which is exact for every rule and costs a few bytes per tag.

>>> from streamguard.detectors.shewhart import rule_order
>>> rule_order(("we4", "we1"))[:3].tolist()
[4, 1, 0]
"""

from __future__ import annotations

import numpy as np
from numba import njit

from ..alarms import AlarmState, DetectorOutput, alarm_step, run_detector
from ..arrays import Columns
from ..config import RULE_NAMES

# Rule codes: position in RULE_NAMES + 1 (0 means "no signal").
WE1, WE2, WE3, WE4 = 1, 2, 3, 4
N1, N2, N3, N4, N5, N6, N7, N8 = 5, 6, 7, 8, 9, 10, 11, 12
RULE_CODES = {name: i + 1 for i, name in enumerate(RULE_NAMES)}


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
        "mask": (np.int32, (), 0),
        "run_length": (np.int32, (), 8),
    }


class ShewhartState(Columns):
    spec = {
        # Last 5 points' zones packed in one word, a byte each: above 2, below -2, above 1, below -1.
        "zones": (np.uint32, (), 0),
        "runs": (np.int32, (5,), 0),  # same side, trend, alternating, inside 1, outside 1
        "last_difference": (np.int8, (), 0),
        "previous": (np.float64, (), np.nan),
    }


_SIDE, _TREND, _ALTERNATING, _INSIDE, _OUTSIDE = 0, 1, 2, 3, 4


@njit(cache=True, inline="always")
def _count3(w):
    return (w & 1) + ((w >> 1) & 1) + ((w >> 2) & 1)


@njit(cache=True, inline="always")
def _count5(w):
    return (w & 1) + ((w >> 1) & 1) + ((w >> 2) & 1) + ((w >> 3) & 1) + ((w >> 4) & 1)


@njit(cache=True, inline="always")
def _forget(t, zones, runs, last_difference, previous):
    zones[t] = 0
    for j in range(5):
        runs[t, j] = 0
    last_difference[t] = 0
    previous[t] = np.nan


_BIT_RULE1 = (1 << WE1) | (1 << N1)
_BIT_TWO_OF_THREE = (1 << WE2) | (1 << N5)
_BIT_FOUR_OF_FIVE = (1 << WE3) | (1 << N6)
_SEQUENCE_RULES = (1 << N3) | (1 << N4) | (1 << N7) | (1 << N8)


def rule_mask(rules: tuple[str, ...]) -> int:
    """Bit r set for each listed rule code r."""
    mask = 0
    for name in rules:
        mask |= 1 << RULE_CODES[name]
    return mask


_THRESHOLD = np.array([0.0, 3.0, 2.0, 1.0, 0.0, 3.0, 0.0, 0.0, 0.0, 2.0, 1.0, 1.0, 1.0])


@njit(cache=True, nogil=True)
def shewhart_kernel(start, tag, z, restart, limit, order, mask, run_length, zones, runs, last_difference, previous,
                    clear_after, alarm, ev_int, ev_float, trace, tr_int, tr_float):  # fmt: skip
    n = tag.shape[0]
    capacity = ev_int.shape[0]
    m = 0
    i = start
    while i < n and m < capacity:
        t = tag[i]
        x = z[i]
        if restart[i]:
            _forget(t, zones, runs, last_difference, previous)
        bits = (np.uint32(x > 2.0) | (np.uint32(x < -2.0) << 8)
                | (np.uint32(x > 1.0) << 16) | (np.uint32(x < -1.0) << 24))  # fmt: skip
        word = ((zones[t] << np.uint32(1)) & np.uint32(0x1E1E1E1E)) | bits
        zones[t] = word
        # Same-side run, written without branches (x's sign is a coin flip for in-control data).
        previous_side = runs[t, _SIDE]
        side = np.int32(x > 0.0) * (max(previous_side, 0) + 1) - np.int32(x < 0.0) * (max(-previous_side, 0) + 1)
        runs[t, _SIDE] = side
        if mask[t] & _SEQUENCE_RULES:
            # Trend, alternation and zone-stratification runs: branchy, so kept only for tags that use them.
            if not np.isnan(previous[t]):
                d = x - previous[t]
                sign = 1 if d > 0 else (-1 if d < 0 else 0)
                trend = runs[t, _TREND]
                runs[t, _TREND] = (trend + 1 if trend > 0 else 1) if sign > 0 else (
                    (trend - 1 if trend < 0 else -1) if sign < 0 else 0)
                if sign != 0 and sign == -last_difference[t]:
                    runs[t, _ALTERNATING] += 1
                else:
                    runs[t, _ALTERNATING] = 1 if sign != 0 else 0
                last_difference[t] = sign
            previous[t] = x
            runs[t, _INSIDE] = runs[t, _INSIDE] + 1 if abs(x) < 1.0 else 0
            runs[t, _OUTSIDE] = runs[t, _OUTSIDE] + 1 if abs(x) > 1.0 else 0
        # A rule can only start to hold at this point if the point itself is beyond 1 sigma (or beyond the
        # rule-1 limit), extends a same-side run, or a sequence rule is in use: most in-control points skip
        # the verdicts entirely.
        up = 0
        down = 0
        if (abs(x) > 1.0 or abs(x) > limit[t] or abs(side) >= run_length[t] or abs(side) >= 9
                or (mask[t] & _SEQUENCE_RULES) != 0):
            # Every rule's verdict as one bit (up and down apart); rules without a direction use "up".
            trend = runs[t, _TREND]
            up = (
                (x > limit[t]) * _BIT_RULE1
                | (_count3(word) >= 2) * _BIT_TWO_OF_THREE
                | (_count5(word >> 16) >= 4) * _BIT_FOUR_OF_FIVE
                | (side >= run_length[t]) * (1 << WE4)
                | (side >= 9) * (1 << N2)
                | (trend >= 5) * (1 << N3)
                | (runs[t, _ALTERNATING] >= 13) * (1 << N4)
                | (runs[t, _INSIDE] >= 15) * (1 << N7)
                | (runs[t, _OUTSIDE] >= 8) * (1 << N8)
            )
            down = (
                (x < -limit[t]) * _BIT_RULE1
                | (_count3(word >> 8) >= 2) * _BIT_TWO_OF_THREE
                | (_count5(word >> 24) >= 4) * _BIT_FOUR_OF_FIVE
                | (side <= -run_length[t]) * (1 << WE4)
                | (side <= -9) * (1 << N2)
                | (trend <= -5) * (1 << N3)
            )
        code = 0
        direction = 0
        if (up | down) & mask[t]:
            for j in range(12):
                rule = order[t, j]
                if rule == 0:
                    break
                if up & (1 << rule):
                    code = rule
                    direction = 0 if (rule == N4 or rule == N7 or rule == N8) else 1
                    break
                if down & (1 << rule):
                    code = rule
                    direction = -1
                    break
        bound = limit[t]
        if code != 0:
            if code != WE1 and code != N1:
                bound = _THRESHOLD[code]
            _forget(t, zones, runs, last_difference, previous)
        if code != 0 or alarm[t, 0] != 0:
            m = alarm_step(t, i, code, direction, x, bound, clear_after, alarm, ev_int, ev_float, m)
        if trace:
            tr_int[i, 0] = code
            tr_int[i, 1] = direction
            tr_float[i, 0] = x
            tr_float[i, 1] = bound
        i += 1
    return i, m


def run_shewhart(tag: np.ndarray, z: np.ndarray, restart: np.ndarray, params: ShewhartParams,
                 state: ShewhartState, alarm: AlarmState | None = None, clear_after: int = 1,
                 trace: bool = False) -> DetectorOutput:  # fmt: skip
    def call(start, *rest):
        return shewhart_kernel(start, tag, z, restart, params.limit, params.order, params.mask, params.run_length,
                               state.zones, state.runs, state.last_difference, state.previous, *rest)  # fmt: skip

    return run_detector(call, tag.shape[0], clear_after, alarm or AlarmState(state.capacity), trace)
