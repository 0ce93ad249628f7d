"""Time alignment of two instruments' samples for the paired comparison.

Two transmitters on the same line seldom report at the same instant. Each sample of the first
is matched to the nearest sample of the second within a tolerance; a sample of the second is
used at most once (by the first-series sample closest to it), so a slow reporter cannot be
counted many times over. Samples left without a partner are counted, not hidden.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np


@dataclass(frozen=True)
class Pairing:
    """Indices of matched samples into the two (time-sorted) series, in time order of the first."""

    first_index: np.ndarray
    second_index: np.ndarray
    tolerance_ns: int
    unmatched_first: int
    unmatched_second: int
    median_offset_s: float | None  # median of (second time - first time) over the pairs

    @property
    def pairs(self) -> int:
        return int(self.first_index.shape[0])

    def to_dict(self) -> dict[str, Any]:
        return {
            "pairs": self.pairs,
            "tolerance_s": self.tolerance_ns / 1e9,
            "unmatched_first": self.unmatched_first,
            "unmatched_second": self.unmatched_second,
            "median_offset_s": self.median_offset_s,
        }


def pair_nearest(ts_first: np.ndarray, ts_second: np.ndarray, tolerance_ns: int) -> Pairing:
    """Nearest-in-time matching within ``tolerance_ns``, one partner per sample; both inputs ascending."""
    if tolerance_ns < 0:
        raise ValueError("tolerance must not be negative")
    a = np.asarray(ts_first, dtype=np.int64)
    b = np.asarray(ts_second, dtype=np.int64)
    if a.shape[0] == 0 or b.shape[0] == 0:
        empty = np.empty(0, dtype=np.int64)
        return Pairing(empty, empty, tolerance_ns, int(a.shape[0]), int(b.shape[0]), None)
    after = np.searchsorted(b, a, side="left")  # first b >= a
    before = np.clip(after - 1, 0, b.shape[0] - 1)
    after = np.clip(after, 0, b.shape[0] - 1)
    gap_before = np.abs(a - b[before])
    gap_after = np.abs(b[after] - a)
    take_after = gap_after < gap_before  # on a tie the earlier sample wins
    nearest = np.where(take_after, after, before)
    gap = np.where(take_after, gap_after, gap_before)
    candidates = np.flatnonzero(gap <= tolerance_ns)
    # One use per second-series sample: among candidates sharing it, keep the closest (then the earliest).
    order = np.lexsort((candidates, gap[candidates], nearest[candidates]))
    ranked = candidates[order]
    keep_first = np.ones(ranked.shape[0], dtype=bool)
    keep_first[1:] = nearest[ranked][1:] != nearest[ranked][:-1]
    first_index = np.sort(ranked[keep_first])
    second_index = nearest[first_index]
    offsets = b[second_index] - a[first_index]
    median_offset = float(np.median(offsets)) / 1e9 if offsets.shape[0] else None
    return Pairing(
        first_index=first_index,
        second_index=second_index,
        tolerance_ns=int(tolerance_ns),
        unmatched_first=int(a.shape[0] - first_index.shape[0]),
        unmatched_second=int(b.shape[0] - first_index.shape[0]),
        median_offset_s=median_offset,
    )
