"""Welch's, the pooled and the paired t test against published worked examples and scipy.

References, named again beside each check:
- Wikipedia, "Student's t-test", section "Worked examples" (data A1, A2 and the unequal-variance
  results read from a stored copy of the page; the equal-variance results are from memory).
- NIST/SEMATECH e-Handbook of Statistical Methods, section 1.3.5.3 (two-sample t-test, AUTO83B car
  mileage summaries); values read as reproduced in Boost.Math's example students_t_two_samples.cpp,
  which cites that page and prints its own Welch result beside it.
- Student's sleep data (Cushny & Peebles 1905), as in R's ``sleep`` dataset; R's paired
  ``t.test`` output quoted from memory.
- scipy.stats.ttest_ind / ttest_rel as an independent implementation.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special, stats

from streamguard.comparison import (
    equivalence_test,
    paired_from_summary,
    paired_test,
    pooled_from_summary,
    pooled_test,
    two_sample_effect_size,
    welch_from_summary,
    welch_test,
)
from streamguard.comparison.t_tests import hedges_correction

# Wikipedia "Student's t-test", Worked examples: six measurements from each of two machines.
WIKI_A1 = [30.02, 29.99, 30.11, 29.97, 30.01, 29.99]
WIKI_A2 = [29.89, 29.93, 29.72, 29.98, 30.02, 29.98]

# Student's sleep data (Cushny & Peebles 1905), R dataset `sleep`: extra hours of sleep, same 10 patients.
SLEEP_GROUP1 = [0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0]
SLEEP_GROUP2 = [1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4]


def test_welch_matches_the_wikipedia_worked_example() -> None:
    """Unequal variances: SE 0.04849, df 7.031, t 1.959 as printed; p 0.090 read, its further digits 0.09077
    from memory. Tolerances are half a unit in the last printed digit."""
    result = welch_test(WIKI_A1, WIKI_A2)
    assert result.difference == pytest.approx(0.095, abs=5e-4)  # Wikipedia: 0.095
    assert result.standard_error == pytest.approx(0.04849, abs=5e-6)  # Wikipedia: ~0.04849
    assert result.df == pytest.approx(7.031, abs=5e-4)  # Wikipedia: ~7.031
    assert result.t == pytest.approx(1.959, abs=5e-4)  # Wikipedia: ~1.959
    assert result.p_value == pytest.approx(0.09077, abs=5e-6)  # Wikipedia: 0.090 read, 0.09077 from memory


def test_pooled_matches_the_wikipedia_worked_example() -> None:
    """Equal variances: df 10, t 1.959, p 0.07857 (Wikipedia, from memory). With equal n the pooled and
    Welch statistics coincide, as the article says; only df and p differ."""
    result = pooled_test(WIKI_A1, WIKI_A2)
    assert result.df == 10
    assert result.t == pytest.approx(1.959, abs=5e-4)  # from memory
    assert result.p_value == pytest.approx(0.07857, abs=5e-6)  # from memory


def test_pooled_from_summary_matches_the_nist_handbook_example() -> None:
    """NIST e-Handbook 1.3.5.3 (AUTO83B): T = -12.62059 with 326 df, from the printed summaries."""
    # Summaries as printed: US cars n=249, mean 20.14458, sd 6.41470; Japanese n=79, 30.48101, 6.10771.
    result = pooled_from_summary(20.14458, 6.41470, 249, 30.48101, 6.10771, 79)
    assert result.df == 326
    # Same rounded inputs as the printed value, so only its last-digit rounding (5e-6) separates them.
    assert result.t == pytest.approx(-12.62059, abs=1e-5)
    # t_{0.975, 326} = 1.9673 is the handbook's critical value; the interval must use it.
    half_width = (result.ci_high - result.ci_low) / 2
    assert half_width / result.standard_error == pytest.approx(1.9673, abs=5e-5)


def test_welch_from_summary_matches_the_boost_example_on_the_nist_data() -> None:
    """Boost.Math students_t_two_samples.cpp output on the NIST summaries: df 136.87, T -12.946."""
    result = welch_from_summary(20.14458, 6.41470, 249, 30.48101, 6.10771, 79)
    assert result.df == pytest.approx(136.87, abs=5e-3)  # printed to 5 significant digits
    assert result.t == pytest.approx(-12.946, abs=5e-4)


@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5])
def test_welch_and_pooled_agree_with_scipy_on_random_samples(seed: int) -> None:
    """scipy.stats.ttest_ind (equal_var False / True) is an independent implementation."""
    rng = np.random.default_rng(seed)
    first = rng.normal(10.0, rng.uniform(0.5, 3.0), size=int(rng.integers(5, 60)))
    second = rng.normal(10.5, rng.uniform(0.5, 3.0), size=int(rng.integers(5, 60)))
    welch, pooled = welch_test(first, second, confidence=0.9), pooled_test(first, second, confidence=0.9)
    pairs = ((welch, False), (pooled, True))
    for ours, equal_var in pairs:
        reference = stats.ttest_ind(first, second, equal_var=equal_var)
        interval = reference.confidence_interval(confidence_level=0.9)
        assert ours.t == pytest.approx(reference.statistic, rel=1e-12)
        assert ours.df == pytest.approx(reference.df, rel=1e-12)
        assert ours.p_value == pytest.approx(reference.pvalue, rel=1e-9)
        assert ours.ci_low == pytest.approx(interval.low, rel=1e-9)
        assert ours.ci_high == pytest.approx(interval.high, rel=1e-9)


def test_paired_matches_students_sleep_data() -> None:
    """R t.test(extra ~ group, data = sleep, paired = TRUE): t = -4.0621, df = 9, p = 0.002833,
    95 % CI -2.4598858 .. -0.7001142, mean difference -1.58 (from memory)."""
    result = paired_test(SLEEP_GROUP1, SLEEP_GROUP2)
    assert result.mean_difference == pytest.approx(-1.58, abs=1e-12)
    assert result.df == 9
    assert result.t == pytest.approx(-4.0621, abs=5e-5)
    assert result.p_value == pytest.approx(0.002833, abs=5e-7)
    assert result.ci_low == pytest.approx(-2.4598858, abs=5e-8)
    assert result.ci_high == pytest.approx(-0.7001142, abs=5e-8)


@pytest.mark.parametrize("seed", [11, 12, 13])
def test_paired_agrees_with_scipy_on_random_pairs(seed: int) -> None:
    """scipy.stats.ttest_rel on correlated pairs, with its confidence interval."""
    rng = np.random.default_rng(seed)
    common = rng.normal(50.0, 5.0, size=40)
    first = common + rng.normal(0.0, 0.3, size=40)
    second = common + 0.1 + rng.normal(0.0, 0.3, size=40)
    ours = paired_test(first, second, confidence=0.99)
    reference = stats.ttest_rel(first, second)
    interval = reference.confidence_interval(confidence_level=0.99)
    assert ours.t == pytest.approx(reference.statistic, rel=1e-12)
    assert ours.p_value == pytest.approx(reference.pvalue, rel=1e-9)
    assert ours.ci_low == pytest.approx(interval.low, rel=1e-9)
    assert ours.ci_high == pytest.approx(interval.high, rel=1e-9)
    assert paired_from_summary(ours.mean_difference, ours.sd_difference, 40).t == pytest.approx(ours.t)


def test_cohen_d_follows_from_the_pooled_t() -> None:
    """Textbook identity d = t sqrt(1/n1 + 1/n2) for the pooled test (e.g. Rosenthal 1991; from memory)."""
    rng = np.random.default_rng(21)
    first, second = rng.normal(1.0, 2.0, 30), rng.normal(0.0, 2.0, 45)
    sd_first, sd_second = first.std(ddof=1), second.std(ddof=1)
    effect = two_sample_effect_size(first.mean(), sd_first, 30, second.mean(), sd_second, 45)
    t = stats.ttest_ind(first, second).statistic
    assert effect.cohen_d == pytest.approx(t * math.sqrt(1 / 30 + 1 / 45), rel=1e-12)


@pytest.mark.parametrize("df", [10, 20, 50, 200])
def test_hedges_factor_approximates_the_exact_gamma_form(df: int) -> None:
    """Hedges (1981): exact J(m) = Gamma(m/2) / (sqrt(m/2) Gamma((m-1)/2)); the approximation 1 - 3/(4m - 1)
    is within 1e-3 of it for m >= 10."""
    exact = math.exp(special.gammaln(df / 2) - special.gammaln((df - 1) / 2)) / math.sqrt(df / 2)
    assert hedges_correction(df) == pytest.approx(exact, abs=1e-3)


def test_equivalence_is_the_larger_of_two_one_sided_scipy_tests() -> None:
    """Schuirmann (1987) TOST: p = max of the two one-sided Welch tests, computed here with scipy."""
    rng = np.random.default_rng(31)
    first, second = rng.normal(0.05, 1.0, 200), rng.normal(0.0, 1.2, 180)
    margin = 0.3
    welch = welch_test(first, second)
    ours = equivalence_test(welch.difference, welch.standard_error, welch.df, margin, alpha=0.05)
    lower = stats.ttest_ind(first + margin, second, equal_var=False, alternative="greater").pvalue
    upper = stats.ttest_ind(first - margin, second, equal_var=False, alternative="less").pvalue
    assert ours.p_value == pytest.approx(max(lower, upper), rel=1e-9)
    assert ours.within_margin == (ours.ci_low > -margin and ours.ci_high < margin)
    assert ours.confidence == pytest.approx(0.90)
