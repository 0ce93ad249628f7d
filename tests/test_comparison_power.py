"""Power, detectable difference and required sample size against Cohen's table and simulation.

References: Cohen, Statistical Power Analysis for the Behavioral Sciences (2nd ed. 1988), Table 2.4.1
(n per group for the two-sample t test, two-sided alpha 0.05), read as reproduced in the MRC CBU
statistics wiki (FAQ "dunp": 393 / 64 / 26 at power 0.80 and 85 at 0.90 for d = 0.2 / 0.5 / 0.8 / 0.5).
Cohen computed his entries with an approximation, so a difference of one against the exact
noncentral-t answer is allowed where stated. Monte Carlo checks use fixed seeds, 3 binomial SEs.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from streamguard.comparison import (
    detectable_difference,
    power_two_sided,
    required_n_paired,
    required_n_two_sample,
)


@pytest.mark.parametrize(
    ("d", "power", "cohen_n", "allowed"),
    [
        (0.5, 0.80, 64, 0),  # Cohen 1988 Table 2.4.1
        (0.8, 0.80, 26, 0),  # Cohen 1988 Table 2.4.1
        (0.2, 0.80, 393, 1),  # Cohen 1988 Table 2.4.1 (exact noncentral t gives 394)
        (0.5, 0.90, 85, 1),  # Cohen 1988 Table 2.4.1 (exact noncentral t gives 86)
    ],
)
def test_required_n_matches_cohens_table(d: float, power: float, cohen_n: int, allowed: int) -> None:
    """n per group to detect d at two-sided alpha 0.05, equal groups."""
    assert abs(required_n_two_sample(d, 1.0, 0.05, power) - cohen_n) <= allowed  # type: ignore[operator]


def test_required_n_scales_with_the_standard_deviation() -> None:
    """Only the ratio difference/SD matters: 2 units against SD 4 is d = 0.5."""
    assert required_n_two_sample(2.0, 4.0, 0.05, 0.8) == required_n_two_sample(0.5, 1.0, 0.05, 0.8)


def test_detectable_difference_inverts_cohens_table() -> None:
    """64 per group (SE = sqrt(2/64), df 126): detectable d at power 0.8 is 0.50 (Cohen Table 2.4.1)."""
    detectable = detectable_difference(math.sqrt(2 / 64), 126, 0.05, 0.8)
    assert detectable == pytest.approx(0.50, abs=0.005)  # table resolution is 0.01 in n-to-d terms


def test_power_at_zero_difference_is_alpha() -> None:
    """A two-sided test rejects a true null with probability alpha."""
    assert power_two_sided(0.0, 17.0, 0.05) == pytest.approx(0.05, abs=1e-12)


def test_two_sample_power_matches_monte_carlo() -> None:
    """4000 simulated tests of n = 64 per group at d = 0.5: rejection rate within 3 binomial SEs."""
    rng = np.random.default_rng(41)
    replicates, n, d = 4000, 64, 0.5
    first = rng.standard_normal((replicates, n)) + d
    second = rng.standard_normal((replicates, n))
    rate = float(np.mean(stats.ttest_ind(first, second, axis=1).pvalue < 0.05))
    predicted = power_two_sided(d * math.sqrt(n / 2), 2 * n - 2, 0.05)
    assert abs(rate - predicted) < 3 * math.sqrt(predicted * (1 - predicted) / replicates)


def test_paired_required_n_reaches_the_power_in_monte_carlo() -> None:
    """Pairs needed for d_z = 0.5 at power 0.8; simulated power at that n within 3 SEs of the prediction,
    and the prediction itself at least 0.8 while one pair fewer falls short."""
    n = required_n_paired(0.5, 1.0, 0.05, 0.8)
    assert n is not None
    assert power_two_sided(0.5 * math.sqrt(n), n - 1, 0.05) >= 0.8
    assert power_two_sided(0.5 * math.sqrt(n - 1), n - 2, 0.05) < 0.8
    rng = np.random.default_rng(42)
    replicates = 4000
    differences = rng.standard_normal((replicates, n)) + 0.5
    rate = float(np.mean(stats.ttest_1samp(differences, 0.0, axis=1).pvalue < 0.05))
    predicted = power_two_sided(0.5 * math.sqrt(n), n - 1, 0.05)
    assert abs(rate - predicted) < 3 * math.sqrt(predicted * (1 - predicted) / replicates)


def test_no_sample_size_can_detect_a_zero_difference() -> None:
    """A threshold of zero has no finite answer; None says so instead of looping."""
    assert required_n_two_sample(0.0, 1.0, 0.05, 0.8) is None
    assert required_n_paired(0.0, 1.0, 0.05, 0.8) is None
