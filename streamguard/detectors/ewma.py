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
>>> out = run_ewma(np.zeros(3, np.int32), np.array([1.0, 1.0, 1.0]), np.zeros(3, bool), params, state)
>>> [round(v, 3) for v in out.statistic]
[0.2, 0.36, 0.488]
"""

from __future__ import annotations

import numpy as np
from numba import njit

from ..arrays import Columns
from . import Signals


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
    }


@njit(cache=True)
def ewma_kernel(tag, z, restart, lam, L, exact, e, count, out_code, out_direction, out_statistic, out_limit):
    for i in range(tag.shape[0]):
        t = tag[i]
        if restart[i]:
            e[t] = 0.0
            count[t] = 0
        count[t] += 1
        w = lam[t]
        e[t] = w * z[i] + (1.0 - w) * e[t]
        variance = w / (2.0 - w)
        if exact[t] and count[t] < 100000:
            variance *= 1.0 - (1.0 - w) ** (2 * count[t])
        bound = L[t] * np.sqrt(variance)
        out_statistic[i] = e[t]
        out_limit[i] = bound
        if abs(e[t]) > bound:
            out_code[i] = 1
            out_direction[i] = 1 if e[t] > 0 else -1
            e[t] = 0.0
            count[t] = 0
        else:
            out_code[i] = 0
            out_direction[i] = 0


def run_ewma(tag: np.ndarray, z: np.ndarray, restart: np.ndarray, params: EwmaParams,
             state: EwmaState) -> Signals:  # fmt: skip
    out = Signals.empty(tag.shape[0])
    ewma_kernel(tag, z, restart, params.lam, params.L, params.exact, state.e, state.count,
                out.code, out.direction, out.statistic, out.limit)  # fmt: skip
    return out
