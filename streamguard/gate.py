"""The data-quality gate: the first stage, deciding which samples may touch detector state.

Bad or (optionally) uncertain quality, NaN/inf, out-of-order and duplicate timestamps, values outside
the instrument range and stuck (stale) values are excluded and counted per tag and reason. Range, stale
and gap conditions also raise data-quality events, which are kept apart from process alarms: a sick
sensor must never look like a shifted process. A gap longer than ``max_gap`` marks the next usable
sample so that the detectors restart their statistics (run rules never span a gap).

A stuck value is recognised only after ``stale_after`` identical values: the first ``stale_after - 1``
repeats look exactly like a healthy signal and do reach the detectors. Choose ``stale_after`` well above
the longest run of repeats a healthy tag shows at its resolution (the baseline data tells).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .arrays import Columns

# Sample outcomes; 0 means the sample goes on to the subgroup stage.
ACCEPTED = 0
BAD_QUALITY = 1
UNCERTAIN_QUALITY = 2
NOT_FINITE = 3
OUT_OF_ORDER = 4
DUPLICATE = 5
OUT_OF_RANGE = 6
STALE = 7
NO_LIMITS = 8
REASONS = (
    "accepted", "bad_quality", "uncertain_quality", "not_finite", "out_of_order",
    "duplicate", "out_of_range", "stale", "no_limits",
)  # fmt: skip

# Data-quality event kinds.
GAP = 1
STALE_START = 2
STALE_END = 3
RANGE_START = 4
RANGE_END = 5
QUALITY_KINDS = ("", "gap", "stale", "stale_end", "range", "range_end")
QUALITY_RULES = ("", "gap", "stale", "stale", "range", "range")

_INT64_MIN = np.iinfo(np.int64).min


class GateParams(Columns):
    spec = {
        "range_low": (np.float64, (), -np.inf),
        "range_high": (np.float64, (), np.inf),
        "stale_after": (np.int32, (), 0),  # 0: off
        "max_gap": (np.int64, (), 0),  # ns; 0: off
        "use_uncertain": (np.bool_, (), False),
        "active": (np.bool_, (), False),  # has frozen limits
    }


class GateState(Columns):
    spec = {
        "first_ts": (np.int64, (), _INT64_MIN),  # oldest timestamp seen, any quality
        "last_ts": (np.int64, (), _INT64_MIN),  # newest timestamp seen, any quality
        "last_used_ts": (np.int64, (), _INT64_MIN),  # newest usable sample, for gaps
        "last_value": (np.float64, (), np.nan),
        "same_count": (np.int32, (), 0),
        "is_stale": (np.bool_, (), False),
        "is_out_of_range": (np.bool_, (), False),
    }


@njit(cache=True, nogil=True)
def gate_kernel(
    start, tag, ts, value, quality,
    range_low, range_high, stale_after, max_gap, use_uncertain, active,
    first_ts, last_ts, last_used_ts, last_value, same_count, is_stale, is_out_of_range,
    counts, reason, restart,
    ev_index, ev_kind, ev_statistic, ev_limit,
):  # fmt: skip
    """Walk samples from ``start``; stop early when the event buffer is nearly full.

    Returns (next index to process, number of events written).
    """
    n = tag.shape[0]
    capacity = ev_index.shape[0]
    n_events = 0
    i = start
    while i < n:
        if n_events + 3 > capacity:
            break
        t = tag[i]
        r = ACCEPTED
        restart[i] = False
        if ts[i] < last_ts[t]:
            r = OUT_OF_ORDER
        elif ts[i] == last_ts[t]:
            r = DUPLICATE
        else:
            if last_ts[t] == _INT64_MIN:
                first_ts[t] = ts[i]
            last_ts[t] = ts[i]
            q = quality[i]
            x = value[i]
            if q == 2:
                r = BAD_QUALITY
            elif q == 1 and not use_uncertain[t]:
                r = UNCERTAIN_QUALITY
            elif not np.isfinite(x):
                r = NOT_FINITE
            elif x < range_low[t] or x > range_high[t]:
                r = OUT_OF_RANGE
                if not is_out_of_range[t]:
                    is_out_of_range[t] = True
                    ev_index[n_events] = i
                    ev_kind[n_events] = RANGE_START
                    ev_statistic[n_events] = x
                    ev_limit[n_events] = range_low[t] if x < range_low[t] else range_high[t]
                    n_events += 1
            else:
                if is_out_of_range[t]:
                    is_out_of_range[t] = False
                    ev_index[n_events] = i
                    ev_kind[n_events] = RANGE_END
                    ev_statistic[n_events] = x
                    ev_limit[n_events] = np.nan
                    n_events += 1
                if stale_after[t] > 0:
                    if x == last_value[t]:
                        same_count[t] += 1
                    else:
                        same_count[t] = 1
                        last_value[t] = x
                        if is_stale[t]:
                            is_stale[t] = False
                            ev_index[n_events] = i
                            ev_kind[n_events] = STALE_END
                            ev_statistic[n_events] = x
                            ev_limit[n_events] = stale_after[t]
                            n_events += 1
                    if same_count[t] >= stale_after[t]:
                        r = STALE
                        if not is_stale[t]:
                            is_stale[t] = True
                            ev_index[n_events] = i
                            ev_kind[n_events] = STALE_START
                            ev_statistic[n_events] = x
                            ev_limit[n_events] = stale_after[t]
                            n_events += 1
                if r == ACCEPTED:
                    if max_gap[t] > 0 and last_used_ts[t] != _INT64_MIN and ts[i] - last_used_ts[t] > max_gap[t]:
                        restart[i] = True
                        ev_index[n_events] = i
                        ev_kind[n_events] = GAP
                        ev_statistic[n_events] = (ts[i] - last_used_ts[t]) / 1e9
                        ev_limit[n_events] = max_gap[t] / 1e9
                        n_events += 1
                    last_used_ts[t] = ts[i]
                    if not active[t]:
                        r = NO_LIMITS
        reason[i] = r
        counts[t, r] += 1
        i += 1
    return i, n_events
