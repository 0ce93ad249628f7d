"""Subgrouping: turn a tag's accepted samples into the points the detectors chart.

Individuals (size 1) pass straight through. ``size: n`` closes a subgroup every n accepted samples;
``window: "60s"`` closes one when a sample arrives in a later window (so a window is decided by the
next sample, identically in live and replay, whatever the batch boundaries). A gap closes the open
subgroup early, with the n it has: the detectors scale their limits with 1/sqrt(n), so a short subgroup
is charted honestly rather than padded or dropped. The subgroup mean's spread is a standard error,
sigma/sqrt(n), not the spread of the product.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit

from .arrays import Columns


class SubgroupParams(Columns):
    spec = {
        "size": (np.int32, (), 1),
        "window": (np.int64, (), 0),  # ns; 0: count subgroups of `size`
    }


class SubgroupState(Columns):
    spec = {
        "count": (np.int32, (), 0),
        "total": (np.float64, (), 0.0),  # sum of (x - pivot)
        "total_sq": (np.float64, (), 0.0),  # sum of (x - pivot)^2
        "pivot": (np.float64, (), 0.0),  # first value of the subgroup, for numerical stability
        "window_id": (np.int64, (), 0),
        "last_ts": (np.int64, (), 0),
        "restart": (np.bool_, (), False),  # the open subgroup follows a gap
    }


@dataclass(frozen=True)
class Points:
    """Charted points, in the order they were completed."""

    sample: np.ndarray  # int64: index in the batch of the sample that completed the point
    tag: np.ndarray  # int32
    ts: np.ndarray  # int64 ns
    mean: np.ndarray  # float64 subgroup mean (the value for individuals)
    sd: np.ndarray  # float64 subgroup standard deviation (NaN when n < 2)
    n: np.ndarray  # int32 samples in the point
    restart: np.ndarray  # bool: detectors restart before this point

    def __len__(self) -> int:
        return int(self.tag.shape[0])


@njit(cache=True, nogil=True)
def _emit(t, k, out_sample, out_tag, out_ts, out_mean, out_sd, out_n, out_restart, sample_index, ts_value,
          count, total, total_sq, pivot, restart):  # fmt: skip
    m = count[t]
    mean_dev = total[t] / m
    out_sample[k] = sample_index
    out_tag[k] = t
    out_ts[k] = ts_value
    out_mean[k] = pivot[t] + mean_dev
    if m > 1:
        var = (total_sq[t] - m * mean_dev * mean_dev) / (m - 1)
        out_sd[k] = np.sqrt(var) if var > 0 else 0.0
    else:
        out_sd[k] = np.nan
    out_n[k] = m
    out_restart[k] = restart[t]
    count[t] = 0
    total[t] = 0.0
    total_sq[t] = 0.0
    restart[t] = False


@njit(cache=True, nogil=True)
def subgroup_kernel(
    tag, ts, value, reason, restart_in,
    size, window,
    count, total, total_sq, pivot, window_id, last_ts, restart,
    out_sample, out_tag, out_ts, out_mean, out_sd, out_n, out_restart,
):  # fmt: skip
    """Accumulate accepted samples (reason == 0); returns the number of points written.

    Each accepted sample completes at most two points (the closed window and, for size 1, itself),
    so the output arrays need at most twice the batch length.
    """
    k = 0
    for i in range(tag.shape[0]):
        if reason[i] != 0:
            continue
        t = tag[i]
        x = value[i]
        if restart_in[i] and count[t] > 0:
            # A gap: chart what the open subgroup has, then start afresh.
            _emit(t, k, out_sample, out_tag, out_ts, out_mean, out_sd, out_n, out_restart, i,
                  last_ts[t] if window[t] == 0 else (window_id[t] + 1) * window[t],
                  count, total, total_sq, pivot, restart)  # fmt: skip
            k += 1
        if window[t] > 0:
            w = ts[i] // window[t]
            if count[t] > 0 and w != window_id[t]:
                _emit(t, k, out_sample, out_tag, out_ts, out_mean, out_sd, out_n, out_restart, i,
                      (window_id[t] + 1) * window[t], count, total, total_sq, pivot, restart)  # fmt: skip
                k += 1
            window_id[t] = w
        if restart_in[i]:
            restart[t] = True
        if count[t] == 0:
            pivot[t] = x
        d = x - pivot[t]
        count[t] += 1
        total[t] += d
        total_sq[t] += d * d
        last_ts[t] = ts[i]
        if window[t] == 0 and count[t] >= size[t]:
            _emit(t, k, out_sample, out_tag, out_ts, out_mean, out_sd, out_n, out_restart, i, ts[i],
                  count, total, total_sq, pivot, restart)  # fmt: skip
            k += 1
    return k


def form_points(
    tag: np.ndarray, ts: np.ndarray, value: np.ndarray, reason: np.ndarray, restart: np.ndarray,
    params: SubgroupParams, state: SubgroupState, all_individuals: bool,
) -> Points:  # fmt: skip
    """Run the subgroup stage; individuals for every tag skip the kernel entirely."""
    if all_individuals:
        accepted = reason == 0
        if accepted.all():
            # The usual case: every sample is a point; no gathering, the batch's arrays are the points.
            n = tag.shape[0]
            return Points(np.arange(n, dtype=np.int64), tag, ts, value, np.full(n, np.nan),
                          np.ones(n, dtype=np.int32), restart)  # fmt: skip
        keep = np.flatnonzero(accepted)
        return Points(
            keep, tag[keep], ts[keep], value[keep],
            np.full(keep.shape[0], np.nan), np.ones(keep.shape[0], dtype=np.int32), restart[keep],
        )  # fmt: skip
    n = tag.shape[0]
    out = (np.empty(2 * n, np.int64), np.empty(2 * n, np.int32), np.empty(2 * n, np.int64),
           np.empty(2 * n, np.float64), np.empty(2 * n, np.float64), np.empty(2 * n, np.int32),
           np.empty(2 * n, np.bool_))  # fmt: skip
    k = subgroup_kernel(
        tag, ts, value, reason, restart, params.size, params.window,
        state.count, state.total, state.total_sq, state.pivot, state.window_id, state.last_ts, state.restart,
        *out,
    )
    return Points(*(a[:k] for a in out))
