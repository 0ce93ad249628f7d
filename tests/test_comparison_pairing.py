"""Nearest-in-time pairing against a brute-force reference written independently of the vectorised code.

The rule (stated in streamguard/comparison/pairing.py): each first-series sample takes its nearest
second-series sample within the tolerance (ties to the earlier one); a second-series sample is kept
by the first-series sample closest to it (ties to the earlier one); everything else is unmatched.
"""

from __future__ import annotations

import numpy as np
import pytest

from streamguard.comparison import pair_nearest

SECOND = 10**9


def brute_force_pairs(a: np.ndarray, b: np.ndarray, tolerance: int) -> list[tuple[int, int]]:
    """O(n m) reading of the rule above."""
    claims: dict[int, tuple[int, int]] = {}  # second index -> (gap, first index)
    for i, t in enumerate(a.tolist()):
        gaps = [abs(t - u) for u in b.tolist()]
        j = min(range(len(gaps)), key=lambda k: (gaps[k], k))
        if gaps[j] > tolerance:
            continue
        if j not in claims or (gaps[j], i) < claims[j]:
            claims[j] = (gaps[j], i)
    return sorted((i, j) for j, (_, i) in claims.items())


@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_pairing_matches_brute_force_on_irregular_times(seed: int) -> None:
    """Random report-by-exception style times, one series sparser than the other."""
    rng = np.random.default_rng(seed)
    a = np.sort(rng.choice(600 * SECOND, size=120, replace=False)).astype(np.int64)
    b = np.sort(rng.choice(600 * SECOND, size=45, replace=False)).astype(np.int64)
    pairing = pair_nearest(a, b, 3 * SECOND)
    expected = brute_force_pairs(a, b, 3 * SECOND)
    assert list(zip(pairing.first_index.tolist(), pairing.second_index.tolist(), strict=True)) == expected
    assert pairing.unmatched_first == a.shape[0] - len(expected)
    assert pairing.unmatched_second == b.shape[0] - len(expected)


def test_jittered_twins_all_pair_up() -> None:
    """Same 1 s grid, second series 0.3 s late: every sample pairs, median offset 0.3 s."""
    a = np.arange(100, dtype=np.int64) * SECOND
    b = a + 3 * SECOND // 10
    pairing = pair_nearest(a, b, SECOND // 2)
    assert pairing.pairs == 100
    assert pairing.unmatched_first == pairing.unmatched_second == 0
    assert pairing.median_offset_s == pytest.approx(0.3)


def test_samples_beyond_tolerance_stay_unmatched() -> None:
    """A 10 s gap with a 5 s tolerance pairs nothing and says so."""
    a = np.array([0, 100], dtype=np.int64) * SECOND
    b = np.array([10, 110], dtype=np.int64) * SECOND
    pairing = pair_nearest(a, b, 5 * SECOND)
    assert pairing.pairs == 0
    assert (pairing.unmatched_first, pairing.unmatched_second) == (2, 2)
