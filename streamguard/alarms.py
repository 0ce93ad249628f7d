"""Alarm state: turn per-point signals into raise and clear transitions, per (tag, detector).

A raise is emitted on the transition from in control to signalling; while raised, further signals
only hold the alarm; ``clear_after`` consecutive in-control points clear it. This hysteresis is what
keeps one real shift from chattering into dozens of alarms (ISA-18.2 calls such repeats chattering).

Each detector kernel calls ``alarm_step`` for every point that signals or belongs to a raised alarm
(the kernel tests that cheap condition itself: measured here, a call on every point costs 7x), so per-point verdicts
never have to be written to memory: only transitions leave the kernel, as compact records in a
buffer. When the buffer fills, the kernel returns where it stopped and ``run_detector`` resumes it
with a fresh buffer, so no transition is ever dropped.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numba import njit

from .arrays import Columns

RAISE = 1
CLEAR = 2

# Columns of the per-tag alarm array, and of the transition records.
RAISED, IN_CONTROL_RUN, RULE, DIRECTION = 0, 1, 2, 3
POINT, KIND = 0, 1  # record columns (RULE and DIRECTION share indices 2 and 3)
STATISTIC, LIMIT = 0, 1


class AlarmState(Columns):
    spec = {"alarm": (np.int32, (4,), 0)}  # raised, in-control run, rule that raised, direction


@njit(cache=True, inline="always")
def alarm_step(t, i, code, direction, statistic, limit, clear_after, alarm, ev_int, ev_float, m):
    """Advance tag t's alarm state by one point; returns the new number of records in the buffer."""
    if code != 0:
        alarm[t, IN_CONTROL_RUN] = 0
        if alarm[t, RAISED] == 0:
            alarm[t, RAISED] = 1
            alarm[t, RULE] = code
            alarm[t, DIRECTION] = direction
            ev_int[m, POINT] = i
            ev_int[m, KIND] = RAISE
            ev_int[m, RULE] = code
            ev_int[m, DIRECTION] = direction
            ev_float[m, STATISTIC] = statistic
            ev_float[m, LIMIT] = limit
            return m + 1
    elif alarm[t, RAISED] != 0:
        alarm[t, IN_CONTROL_RUN] += 1
        if alarm[t, IN_CONTROL_RUN] >= clear_after:
            alarm[t, RAISED] = 0
            alarm[t, IN_CONTROL_RUN] = 0
            ev_int[m, POINT] = i
            ev_int[m, KIND] = CLEAR
            ev_int[m, RULE] = alarm[t, RULE]
            ev_int[m, DIRECTION] = alarm[t, DIRECTION]
            ev_float[m, STATISTIC] = statistic
            ev_float[m, LIMIT] = limit
            return m + 1
    return m


@dataclass(frozen=True)
class DetectorOutput:
    """Transitions of one detector over a batch, and (only when asked) its per-point trace."""

    point: np.ndarray  # int64 index into the batch's points
    kind: np.ndarray  # RAISE / CLEAR
    rule: np.ndarray  # the detector's rule code (for a clear: the rule that raised)
    direction: np.ndarray  # +1 up, -1 down, 0 none
    statistic: np.ndarray
    limit: np.ndarray
    trace_code: np.ndarray  # per point, empty unless traced
    trace_direction: np.ndarray
    trace_statistic: np.ndarray
    trace_limit: np.ndarray


KernelCall = Callable[..., tuple[int, int]]


def run_detector(call: KernelCall, n: int, clear_after: int, state: AlarmState, trace: bool = False,
                 capacity: int = 4096) -> DetectorOutput:  # fmt: skip
    """Drive a detector kernel over n points, resuming it whenever its transition buffer fills.

    ``call(start, clear_after, alarm, ev_int, ev_float, trace, tr_int, tr_float)`` is the kernel with its
    detector-specific arrays already bound.
    """
    tr_int = np.zeros((n if trace else 0, 2), np.int8)
    tr_float = np.zeros((n if trace else 0, 2), np.float64)
    ints: list[np.ndarray] = []
    floats: list[np.ndarray] = []
    start = 0
    while True:
        ev_int = np.empty((capacity, 4), np.int64)
        ev_float = np.empty((capacity, 2), np.float64)
        start, m = call(start, clear_after, state.alarm, ev_int, ev_float, trace, tr_int, tr_float)
        ints.append(ev_int[:m])
        floats.append(ev_float[:m])
        if start >= n:
            break
    ev_i = ints[0] if len(ints) == 1 else np.concatenate(ints)
    ev_f = floats[0] if len(floats) == 1 else np.concatenate(floats)
    return DetectorOutput(ev_i[:, POINT], ev_i[:, KIND], ev_i[:, RULE], ev_i[:, DIRECTION],
                          ev_f[:, STATISTIC], ev_f[:, LIMIT],
                          tr_int[:, 0], tr_int[:, 1], tr_float[:, 0], tr_float[:, 1])  # fmt: skip
