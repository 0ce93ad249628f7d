"""Alarm state: turn per-point signals into raise and clear transitions, per (tag, detector).

A raise is emitted on the transition from in control to signalling; while raised, further signals
only hold the alarm; ``clear_after`` consecutive in-control points clear it. This hysteresis is what
keeps one real shift from chattering into dozens of alarms (ISA-18.2 calls such repeats chattering).
Only transitions leave this stage, as compact records; Python objects are made for them downstream.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit

from .arrays import Columns

RAISE = 1
CLEAR = 2


class AlarmState(Columns):
    spec = {
        "raised": (np.bool_, (), False),
        "in_control_run": (np.int32, (), 0),
        "rule": (np.int8, (), 0),
        "direction": (np.int8, (), 0),
    }


@dataclass(frozen=True)
class Transitions:
    point: np.ndarray  # int64 index into the batch's points
    kind: np.ndarray  # int8 RAISE / CLEAR
    rule: np.ndarray  # int8 the detector's rule code (for a clear: the rule that raised)
    direction: np.ndarray  # int8


@njit(cache=True)
def alarm_kernel(start, tag, code, direction, clear_after, raised, in_control_run, rule, alarm_direction,
                 ev_point, ev_kind, ev_rule, ev_direction):  # fmt: skip
    """Returns (next point to process, transitions written); stops when the buffer is full."""
    capacity = ev_point.shape[0]
    k = 0
    i = start
    while i < tag.shape[0]:
        if k >= capacity:
            break
        t = tag[i]
        if code[i] != 0:
            in_control_run[t] = 0
            if not raised[t]:
                raised[t] = True
                rule[t] = code[i]
                alarm_direction[t] = direction[i]
                ev_point[k] = i
                ev_kind[k] = RAISE
                ev_rule[k] = code[i]
                ev_direction[k] = direction[i]
                k += 1
        elif raised[t]:
            in_control_run[t] += 1
            if in_control_run[t] >= clear_after:
                raised[t] = False
                in_control_run[t] = 0
                ev_point[k] = i
                ev_kind[k] = CLEAR
                ev_rule[k] = rule[t]
                ev_direction[k] = alarm_direction[t]
                k += 1
        i += 1
    return i, k


def find_transitions(tag: np.ndarray, code: np.ndarray, direction: np.ndarray, clear_after: int,
                     state: AlarmState, capacity: int = 4096) -> Transitions:  # fmt: skip
    """Run the alarm stage over a batch's points, growing the transition buffer as needed."""
    parts: list[tuple[np.ndarray, ...]] = []
    start = 0
    n = tag.shape[0]
    while True:
        buffers = (np.empty(capacity, np.int64), np.empty(capacity, np.int8),
                   np.empty(capacity, np.int8), np.empty(capacity, np.int8))  # fmt: skip
        start, k = alarm_kernel(start, tag, code, direction, clear_after, state.raised, state.in_control_run,
                                state.rule, state.direction, *buffers)  # fmt: skip
        parts.append(tuple(b[:k] for b in buffers))
        if start >= n:
            break
    if len(parts) == 1:
        return Transitions(*parts[0])
    return Transitions(*(np.concatenate([p[j] for p in parts]) for j in range(4)))
