"""The comparisons end to end on simulated data: false-positive rates under autocorrelation, and the rest.

The central check: on two stretches of the same AR(1) process (phi = 0.7, no true difference) a test
at alpha = 0.05 must reject about 5 % of the time. The naive test, counting every sample as
independent, rejects far more often (theory: the standard error is too small by sqrt((1+phi)/(1-phi))
= 2.38, so about P(|Z| > 1.96/2.38) = 41 %). Tolerance: 3 binomial standard errors of the estimated
rate, sqrt(0.05 * 0.95 / R).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats
from scipy.signal import lfilter

from streamguard.comparison import (
    block_mean_correlation,
    compare_paired,
    compare_samples,
    format_paired,
    format_two_sample,
    to_json,
)

REPLICATES = 3000
FALSE_ALARM_TOLERANCE = 3 * math.sqrt(0.05 * 0.95 / REPLICATES)  # 3 binomial SEs: 0.0119


def ar1(phi: float, shape: tuple[int, ...], seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    noise = rng.standard_normal(shape)
    noise[..., 0] /= math.sqrt(1.0 - phi * phi)  # start in the stationary distribution
    return lfilter([1.0], [1.0, -phi], noise, axis=-1)


@pytest.fixture(scope="module")
def null_pairs() -> np.ndarray:
    """REPLICATES pairs of AR(1) stretches (phi 0.7, 1000 samples each) with equal means."""
    return ar1(0.7, (REPLICATES, 2, 1000), seed=20240601)


def _rejection_rate(pairs: np.ndarray, method: str) -> float:
    rejected = 0
    for first, second in pairs:
        rejected += compare_samples(first, second, method=method).welch.p_value < 0.05  # type: ignore[arg-type]
    return rejected / pairs.shape[0]


@pytest.mark.parametrize("method", ["blocks", "effective_n"])
def test_corrected_tests_hold_the_false_alarm_rate_on_ar1_data(null_pairs: np.ndarray, method: str) -> None:
    """Blocks and effective n reject a true null at 5 % +- 3 SE on AR(1) phi = 0.7.

    The blocks method is expected slightly above 5 % (about 5.5 %): block means correlated at 0.025
    understate the variance of the mean by about 5 %.
    """
    rate = _rejection_rate(null_pairs, method)
    assert abs(rate - 0.05) < FALSE_ALARM_TOLERANCE


def test_naive_test_rejects_several_times_too_often_on_ar1_data(null_pairs: np.ndarray) -> None:
    """The naive test's false-alarm rate is near the theoretical 41 %, at least five times the nominal 5 %."""
    rate = _rejection_rate(null_pairs[:1000], "naive")
    theory = 2 * stats.norm.sf(1.959964 / math.sqrt(1.7 / 0.3))
    assert rate > 5 * 0.05
    assert abs(rate - theory) < 3 * math.sqrt(theory * (1 - theory) / 1000)


def test_blocks_method_explains_its_block_length() -> None:
    """The result names the block length and the AR(1) correlation of block means it relied on."""
    pair = ar1(0.7, (2, 2000), seed=7)
    result = compare_samples(pair[0], pair[1] + 0.2, labels=("before", "after"))
    assert result.blocks is not None
    length = result.blocks.block_length
    phi = max(result.first.lag1_autocorrelation, result.second.lag1_autocorrelation)
    assert block_mean_correlation(length, phi) <= 0.025 < block_mean_correlation(length - 1, phi)
    assert f"blocks of {length} values" in result.method_reason
    assert result.difference_label == "after - before"
    assert result.blocks.blocks == (2000 // length, 2000 // length)


def test_independent_data_get_blocks_of_one_and_match_scipy() -> None:
    """White noise needs no blocks: the blocks method is then Welch's test, checked against scipy."""
    rng = np.random.default_rng(8)
    first, second = rng.normal(0, 1, 300), rng.normal(0.3, 2, 250)
    result = compare_samples(first, second)
    if result.blocks is not None:
        assert result.blocks.block_length == 1
    reference = stats.ttest_ind(second, first, equal_var=False)
    assert result.welch.t == pytest.approx(reference.statistic, rel=1e-12)
    assert result.welch.p_value == pytest.approx(reference.pvalue, rel=1e-9)


def test_naive_method_warns_about_autocorrelation() -> None:
    """An autocorrelated input run naively carries a note saying the p-value is too small."""
    pair = ar1(0.8, (2, 500), seed=9)
    result = compare_samples(pair[0], pair[1], method="naive")
    assert any("too small" in note for note in result.notes)


def test_short_persistent_series_shortens_blocks_and_says_so() -> None:
    """phi 0.95 with 300 samples cannot have ~400-sample blocks: blocks shrink, a note warns."""
    pair = ar1(0.95, (2, 300), seed=10)
    result = compare_samples(pair[0], pair[1])
    assert result.blocks is not None
    assert result.blocks.block_length == 300 // 10
    assert any("optimistic" in note for note in result.notes)


def test_power_answer_for_independent_data_follows_cohen() -> None:
    """SD 1 in both groups, threshold 0.5: 64 independent samples per group (Cohen 1988 Table 2.4.1)."""
    rng = np.random.default_rng(12)
    first = rng.standard_normal(5000)
    second = rng.standard_normal(5000)
    first = (first - first.mean()) / first.std(ddof=1)  # exactly SD 1 so the table applies
    second = (second - second.mean()) / second.std(ddof=1)
    result = compare_samples(first, second, method="naive", threshold=0.5, sample_interval_s=2.0)
    assert result.power.required_independent_n == 64
    assert result.power.required_samples == 64
    assert result.power.required_duration_s == pytest.approx(128.0)


def test_effective_n_power_converts_independent_samples_to_raw_samples() -> None:
    """Needed raw samples are the independent ones times (1 + r1)/(1 - r1) at the larger r1."""
    pair = ar1(0.6, (2, 3000), seed=13)
    result = compare_samples(pair[0], pair[1], method="effective_n", threshold=0.3)
    phi = max(result.first.lag1_autocorrelation, result.second.lag1_autocorrelation)
    assert result.power.required_independent_n is not None
    expected = math.ceil(result.power.required_independent_n * (1 + phi) / (1 - phi))
    assert result.power.required_samples == expected


def test_paired_naive_matches_scipy_and_limits_of_agreement_cover_95_percent() -> None:
    """Paired t against scipy.stats.ttest_rel; Bland & Altman (1986) limits hold ~95 % of differences
    (within 3 binomial SEs for 20000 pairs)."""
    rng = np.random.default_rng(14)
    truth = rng.normal(100.0, 5.0, 20_000)
    first = truth + rng.normal(0.0, 0.2, truth.shape)
    second = truth + 0.05 + rng.normal(0.0, 0.2, truth.shape)
    result = compare_paired(first, second, method="naive", labels=("FT-101", "FT-102"))
    reference = stats.ttest_rel(second, first)
    assert result.test.t == pytest.approx(reference.statistic, rel=1e-10)
    assert result.test.p_value == pytest.approx(reference.pvalue, rel=1e-6, abs=1e-300)
    differences = second - first
    limits = result.limits_of_agreement
    inside = np.mean((differences > limits.low) & (differences < limits.high))
    assert abs(inside - 0.95) < 3 * math.sqrt(0.95 * 0.05 / differences.shape[0])
    assert result.difference_label == "FT-102 - FT-101"


def test_paired_equivalence_shows_agreement_within_a_margin() -> None:
    """Two instruments 0.01 apart with noise 0.1 on 5000 independent pairs agree within +-0.05 (TOST)."""
    rng = np.random.default_rng(15)
    truth = rng.normal(10.0, 1.0, 5000)
    first = truth + rng.normal(0, 0.1, 5000)
    second = truth + 0.01 + rng.normal(0, 0.1, 5000)
    result = compare_paired(first, second, threshold=0.05)
    assert result.equivalence is not None and result.equivalence.within_margin
    assert result.equivalence.ci_low > -0.05 and result.equivalence.ci_high < 0.05


def test_results_render_as_strict_json_and_text() -> None:
    """to_dict gives JSON without NaN (undefined values become null); the tables name the method."""
    pair = ar1(0.5, (2, 400), seed=16)
    two = compare_samples(pair[0], pair[1], threshold=0.5, labels=("before", "after"))
    paired = compare_paired(pair[0], pair[1] + 0.1, threshold=0.5)
    for result in (two, paired):
        document = json.loads(to_json(result.to_dict()))
        assert document["method"] == "blocks"
    assert json.loads(to_json(two.to_dict()))["welch"]["name"] == "Welch"
    assert "method blocks" in format_two_sample(two)
    assert "limits of agreement" in format_paired(paired)
    constant = compare_samples([1.0, 1.0, 1.0, 1.0], [1.0, 1.0, 1.0, 1.0], method="naive")
    assert json.loads(to_json(constant.to_dict()))["welch"]["t"] is None


def test_bad_settings_are_refused() -> None:
    """Unknown method and out-of-range alpha raise ValueError naming the setting."""
    with pytest.raises(ValueError, match="method"):
        compare_samples([1.0, 2.0, 3.0], [1.0, 2.0, 3.0], method="median")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="alpha"):
        compare_samples([1.0, 2.0, 3.0], [1.0, 2.0, 3.0], alpha=0.7)
