"""Redundant sensors: align two tags in time, chart their difference, and test it for a lasting bias.

Two instruments on one process share its movement; their difference cancels it and leaves what matters
here: calibration drift, fouling, a failing element. Each accepted sample of one member is matched with the
other member's pending sample when they lie within ``tolerance`` of each other (each sample is used once;
samples left without a partner are counted). The difference a - (scale * b + offset) becomes a sample of
the pair's derived tag, which then passes the gate, subgrouping and the detectors like any other tag, on
a baseline of its own (the frozen mean difference and its sigma).

Beside the detectors, each pair gets a windowed paired comparison: over consecutive windows of ``window``
the mean difference and its confidence interval are computed, with the sample count shrunk to an
effective n = n (1 - r1) / (1 + r1) because differences of fast sensors are autocorrelated (the AR(1)
correction; Bayley & Hammersley 1946, from memory). A ``pair-bias`` event is raised when the interval
excludes zero *and* the bias exceeds the pair's practical threshold in engineering units: a statistically
clear but practically irrelevant offset is not worth an operator's attention.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit

from .arrays import Columns
from .gate import ACCEPTED, NO_LIMITS


class PairParams(Columns):
    spec = {
        "a": (np.int32, (), -1),
        "b": (np.int32, (), -1),
        "derived": (np.int32, (), -1),
        "scale": (np.float64, (), 1.0),
        "offset": (np.float64, (), 0.0),
        "tolerance": (np.int64, (), 0),
        "window": (np.int64, (), 0),
    }


class PairState(Columns):
    spec = {
        "pending_ts": (np.int64, (2,), 0),  # [a, b]
        "pending_value": (np.float64, (2,), 0.0),
        "has_pending": (np.bool_, (2,), False),
        "unmatched": (np.int64, (2,), 0),
        "matched": (np.int64, (), 0),
        "window_id": (np.int64, (), 0),
        "count": (np.int64, (), 0),
        "total": (np.float64, (), 0.0),
        "total_sq": (np.float64, (), 0.0),
        "cross": (np.float64, (), 0.0),  # sum of d_t * d_(t-1) inside the window
        "last": (np.float64, (), np.nan),
        "bias_raised": (np.bool_, (), False),
    }


@dataclass(frozen=True)
class Windows:
    """Closed comparison windows: per-pair sums from which the mean difference and its interval follow."""

    pair: np.ndarray
    end_ts: np.ndarray
    count: np.ndarray
    total: np.ndarray
    total_sq: np.ndarray
    cross: np.ndarray


@njit(cache=True, nogil=True)
def pair_kernel(tag, ts, value, reason, pair_of, role_of, a_tag, b_tag, derived, scale, offset, tolerance, window,
                pending_ts, pending_value, has_pending, unmatched, matched, window_id, count, total, total_sq,
                cross, last, out_tag, out_ts, out_value, win_pair, win_end, win_count, win_total, win_total_sq,
                win_cross):  # fmt: skip
    """Returns (derived samples written, windows closed). Output arrays need the batch's length."""
    k = 0
    w = 0
    for i in range(tag.shape[0]):
        # Usable samples only; a member needs no limits of its own (NO_LIMITS) to take part in its pair.
        if reason[i] != ACCEPTED and reason[i] != NO_LIMITS:
            continue
        p = pair_of[tag[i]]
        if p < 0:
            continue
        me = role_of[tag[i]]
        other = 1 - me
        x = value[i]
        # A pending partner too old to match anything from now on is given up.
        if has_pending[p, other] and ts[i] - pending_ts[p, other] > tolerance[p]:
            has_pending[p, other] = False
            unmatched[p, other] += 1
        if has_pending[p, other]:
            if me == 0:
                d = x - (scale[p] * pending_value[p, other] + offset[p])
            else:
                d = pending_value[p, other] - (scale[p] * x + offset[p])
            when = max(ts[i], pending_ts[p, other])
            has_pending[p, other] = False
            matched[p] += 1
            out_tag[k] = derived[p]
            out_ts[k] = when
            out_value[k] = d
            k += 1
            wid = when // window[p]
            if count[p] > 0 and wid != window_id[p]:
                win_pair[w] = p
                win_end[w] = (window_id[p] + 1) * window[p]
                win_count[w] = count[p]
                win_total[w] = total[p]
                win_total_sq[w] = total_sq[p]
                win_cross[w] = cross[p]
                w += 1
                count[p] = 0
                total[p] = 0.0
                total_sq[p] = 0.0
                cross[p] = 0.0
                last[p] = np.nan
            window_id[p] = wid
            count[p] += 1
            total[p] += d
            total_sq[p] += d * d
            if not np.isnan(last[p]):
                cross[p] += d * last[p]
            last[p] = d
        else:
            if has_pending[p, me]:
                unmatched[p, me] += 1
            has_pending[p, me] = True
            pending_ts[p, me] = ts[i]
            pending_value[p, me] = x
    return k, w


def window_statistics(windows: Windows, index: int, confidence: float) -> dict[str, float]:
    """Mean difference, sd, lag-1 autocorrelation, effective n and the confidence interval of one window."""
    from scipy import stats

    n = float(windows.count[index])
    mean = windows.total[index] / n
    variance = max((windows.total_sq[index] - n * mean * mean) / max(n - 1.0, 1.0), 0.0)
    sd = variance**0.5
    r1 = 0.0
    if n > 2 and variance > 0:
        # sum d_t d_(t-1) over n - 1 pairs, centred with the window mean (adequate for r1's use here).
        r1 = ((windows.cross[index] / (n - 1.0)) - mean * mean) / variance
        r1 = min(max(r1, 0.0), 0.99)
    effective = max(n * (1.0 - r1) / (1.0 + r1), 2.0)
    half = float(stats.t.ppf(0.5 + confidence / 2.0, effective - 1.0)) * sd / effective**0.5
    return {"n": n, "mean": mean, "sd": sd, "r1": r1, "effective_n": effective, "low": mean - half, "high": mean + half}
