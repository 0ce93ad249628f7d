"""Two-sided tabular CUSUM in standard-error units.

Method: Page, "Continuous inspection schemes", Biometrika 41 (1954); the tabular form and the fast
initial response (headstart) after Lucas & Crosier, Technometrics 24 (1982). With reference value k
the CUSUM is tuned to a shift of 2k standard errors; the decision interval h trades in-control run
length (k = 0.5: 168 points at h = 4, 465 at h = 5) against detection delay (8.38 and 10.4 points for
a one-sigma shift). It accumulates small persistent shifts that a Shewhart chart misses, which is why
it also accumulates autocorrelation: check the baseline report before trusting its design ARL.

    upper = max(0, upper + z - k)      lower = max(0, lower - z - k)      signal when either > h

Both sides start, and restart after a signal or a gap, at headstart * h. The statistic reported is
the side further from zero, signed (upper positive, lower negative).

>>> import numpy as np
>>> from streamguard.detectors.cusum import CusumParams, CusumState, run_cusum
>>> params, state = CusumParams(1), CusumState(1)
>>> params.k[0], params.h[0] = 0.5, 5.0
>>> z = np.array([0.0, 2.0, 2.0, 2.0, 2.0])
>>> out = run_cusum(np.zeros(5, np.int32), z, np.zeros(5, bool), params, state, trace=True)
>>> out.trace_statistic.tolist(), out.trace_code.tolist()
([0.0, 1.5, 3.0, 4.5, 6.0], [0, 0, 0, 0, 1])
"""

from __future__ import annotations

import numpy as np
from numba import njit

from ..alarms import AlarmState, DetectorOutput, alarm_step, run_detector
from ..arrays import Columns


class CusumParams(Columns):
    spec = {
        "k": (np.float64, (), 0.5),
        "h": (np.float64, (), 5.0),
        "headstart": (np.float64, (), 0.0),
    }


class CusumState(Columns):
    spec = {
        "upper": (np.float64, (), 0.0),
        "lower": (np.float64, (), 0.0),
        "started": (np.bool_, (), False),
    }


@njit(cache=True, nogil=True)
def cusum_kernel(start, tag, z, restart, k, h, headstart, upper, lower, started,
                 clear_after, alarm, ev_int, ev_float, trace, tr_int, tr_float):  # fmt: skip
    n = tag.shape[0]
    capacity = ev_int.shape[0]
    m = 0
    i = start
    while i < n and m < capacity:
        t = tag[i]
        if restart[i] or not started[t]:
            upper[t] = headstart[t] * h[t]
            lower[t] = headstart[t] * h[t]
            started[t] = True
        upper[t] = max(0.0, upper[t] + z[i] - k[t])
        lower[t] = max(0.0, lower[t] - z[i] - k[t])
        statistic = upper[t] if upper[t] >= lower[t] else -lower[t]
        code = 0
        direction = 0
        if upper[t] > h[t] or lower[t] > h[t]:
            code = 1
            direction = 1 if upper[t] >= lower[t] else -1
            upper[t] = headstart[t] * h[t]
            lower[t] = headstart[t] * h[t]
        if code != 0 or alarm[t, 0] != 0:
            m = alarm_step(t, i, code, direction, statistic, h[t], clear_after, alarm, ev_int, ev_float, m)
        if trace:
            tr_int[i, 0] = code
            tr_int[i, 1] = direction
            tr_float[i, 0] = statistic
            tr_float[i, 1] = h[t]
        i += 1
    return i, m


def run_cusum(tag: np.ndarray, z: np.ndarray, restart: np.ndarray, params: CusumParams, state: CusumState,
              alarm: AlarmState | None = None, clear_after: int = 1,
              trace: bool = False) -> DetectorOutput:  # fmt: skip
    def call(start, *rest):
        return cusum_kernel(start, tag, z, restart, params.k, params.h, params.headstart,
                            state.upper, state.lower, state.started, *rest)  # fmt: skip

    return run_detector(call, tag.shape[0], clear_after, alarm or AlarmState(state.capacity), trace)
