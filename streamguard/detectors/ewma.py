"""EWMA chart in standard-error units, with exact (time-varying) or asymptotic limits.

Method: Roberts, "Control chart tests based on geometric moving averages", Technometrics 1 (1959);
design tables and run lengths from Lucas & Saccucci, Technometrics 32 (1990). A small lambda averages
over many points and finds small shifts quickly, at the cost of reacting slowly to large ones;
(lambda, L) = (0.2, 2.962) gives an in-control ARL of about 500 with asymptotic limits. Exact limits
are narrower for the first points after a start, so a process that starts off-target is caught early.

    e = lambda * z + (1 - lambda) * e,     signal when |e| > L * sqrt(lambda/(2-lambda) * (1-(1-lambda)^(2i)))

with i the points since the start (asymptotic limits drop the last factor). The statistic restarts at
the centre after a signal or a gap.

>>> import numpy as np
>>> from streamguard.detectors.ewma import EwmaParams, EwmaState, run_ewma
>>> params, state = EwmaParams(1), EwmaState(1)
>>> out = run_ewma(np.zeros(3, np.int32), np.array([1.0, 1.0, 1.0]), np.zeros(3, bool), params, state, trace=True)
>>> [round(v, 3) for v in out.trace_statistic]
[0.2, 0.36, 0.488]
"""

from __future__ import annotations

import numpy as np
from numba import njit

from ..alarms import AlarmState, DetectorOutput, alarm_step, run_detector
from ..arrays import Columns


class EwmaParams(Columns):
    spec = {
        "lam": (np.float64, (), 0.2),
        "L": (np.float64, (), 2.962),
        "exact": (np.bool_, (), True),
    }


class EwmaState(Columns):
    spec = {
        "e": (np.float64, (), 0.0),
        "count": (np.int64, (), 0),
        "decay": (np.float64, (), 1.0),  # (1 - lambda)^(2i), kept as a running product
    }


@njit(cache=True, nogil=True)
def ewma_kernel(start, tag, z, restart, lam, L, exact, e, count, decay,
                clear_after, alarm, ev_int, ev_float, trace, tr_int, tr_float):  # fmt: skip
    n = tag.shape[0]
    capacity = ev_int.shape[0]
    m = 0
    i = start
    while i < n and m < capacity:
        t = tag[i]
        if restart[i]:
            e[t] = 0.0
            count[t] = 0
            decay[t] = 1.0
        count[t] += 1
        w = lam[t]
        e[t] = w * z[i] + (1.0 - w) * e[t]
        variance = w / (2.0 - w)
        if exact[t]:
            decay[t] *= (1.0 - w) * (1.0 - w)
            variance *= 1.0 - decay[t]
        bound = L[t] * np.sqrt(variance)
        statistic = e[t]
        code = 0
        direction = 0
        if abs(statistic) > bound:
            code = 1
            direction = 1 if statistic > 0 else -1
            e[t] = 0.0
            count[t] = 0
            decay[t] = 1.0
        if code != 0 or alarm[t, 0] != 0:
            m = alarm_step(t, i, code, direction, statistic, bound, clear_after, alarm, ev_int, ev_float, m)
        if trace:
            tr_int[i, 0] = code
            tr_int[i, 1] = direction
            tr_float[i, 0] = statistic
            tr_float[i, 1] = bound
        i += 1
    return i, m


def run_ewma(tag: np.ndarray, z: np.ndarray, restart: np.ndarray, params: EwmaParams, state: EwmaState,
             alarm: AlarmState | None = None, clear_after: int = 1, trace: bool = False) -> DetectorOutput:  # fmt: skip
    def call(start, *rest):
        return ewma_kernel(start, tag, z, restart, params.lam, params.L, params.exact,
                           state.e, state.count, state.decay, *rest)  # fmt: skip

    return run_detector(call, tag.shape[0], clear_after, alarm or AlarmState(state.capacity), trace)
