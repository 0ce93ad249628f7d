"""Lag-1 autocorrelation, effective sample size and block means against AR(1) theory and simulation.

References: Box & Jenkins, Time Series Analysis (the lag-1 estimator; Bartlett's variance (1 - phi^2)/n
of r1 for an AR(1) series) and the variance of the mean of a stationary series,
var(mean) = gamma0/n [1 + 2 sum_k (1 - k/n) rho_k] (e.g. Priestley, Spectral Analysis and Time Series,
section 5.3) - both from memory. Simulations use fixed seeds; tolerances are stated in sampling SEs.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.signal import lfilter

from streamguard.comparison import (
    block_mean_correlation,
    block_means,
    choose_block_length,
    effective_sample_size,
    lag1_autocorrelation,
)


def ar1(phi: float, shape: tuple[int, ...], seed: int) -> np.ndarray:
    """Stationary AR(1) with unit innovation variance, simulated along the last axis."""
    rng = np.random.default_rng(seed)
    noise = rng.standard_normal(shape)
    noise[..., 0] /= math.sqrt(1.0 - phi * phi)  # start in the stationary distribution
    return lfilter([1.0], [1.0, -phi], noise, axis=-1)


def test_lag1_estimate_recovers_phi_within_bartletts_standard_error() -> None:
    """r1 of a long AR(1) series lies within 4 SE of phi, SE = sqrt((1 - phi^2)/n) (Bartlett, from memory)."""
    n, phi = 200_000, 0.7
    estimate = lag1_autocorrelation(ar1(phi, (n,), seed=3))
    assert abs(estimate - phi) < 4 * math.sqrt((1 - phi * phi) / n)


def test_lag1_of_white_noise_is_near_zero() -> None:
    """Independent values: r1 within 4 SE of its expectation -1/n, SE = 1/sqrt(n)."""
    n = 50_000
    values = np.random.default_rng(4).standard_normal(n)
    assert abs(lag1_autocorrelation(values) + 1 / n) < 4 / math.sqrt(n)


def test_lag1_is_undefined_for_constant_or_tiny_samples() -> None:
    """No variance, or fewer than three values, gives NaN rather than a number."""
    assert math.isnan(lag1_autocorrelation([5.0, 5.0, 5.0, 5.0]))
    assert math.isnan(lag1_autocorrelation([1.0, 2.0]))


@pytest.mark.parametrize("phi", [0.3, 0.7, 0.9])
def test_effective_n_matches_the_exact_variance_of_the_mean_for_long_series(phi: float) -> None:
    """n/n_eff = (1 + phi)/(1 - phi) is the large-n limit of 1 + 2 sum (1 - k/n) phi^k (Priestley 5.3)."""
    n = 20_000
    k = np.arange(1, n)
    exact_inflation = 1 + 2 * np.sum((1 - k / n) * phi**k)
    # the finite-n correction is about 2 phi / (n (1 - phi)^2) relative: below 0.2 % here
    assert n / effective_sample_size(n, phi) == pytest.approx(exact_inflation, rel=2e-3)


def test_effective_n_never_exceeds_n() -> None:
    """Negative or undefined r1 counts as zero: the correction only ever removes information."""
    assert effective_sample_size(100, -0.4) == 100
    assert effective_sample_size(100, math.nan) == 100
    assert effective_sample_size(100, 0.5) == pytest.approx(100 / 3)


def test_effective_n_predicts_the_spread_of_simulated_means() -> None:
    """Variance of 4000 AR(1) means of n = 400 matches theory within 3 SE (relative SE of a variance:
    sqrt(2/(R-1)))."""
    phi, n, replicates = 0.7, 400, 4000
    series = ar1(phi, (replicates, n), seed=5)
    gamma0 = 1.0 / (1.0 - phi * phi)
    # exact finite-n inflation, so the check isolates the simulation from the large-n approximation
    k = np.arange(1, n)
    predicted = gamma0 / n * (1 + 2 * np.sum((1 - k / n) * phi**k))
    observed = float(series.mean(axis=1).var(ddof=1))
    assert observed / predicted == pytest.approx(1.0, abs=3 * math.sqrt(2 / (replicates - 1)))
    # and the AR(1) effective n is within 2 % of that exact inflation at n = 400
    assert gamma0 / effective_sample_size(n, phi) == pytest.approx(predicted, rel=0.02)


def _brute_force_block_correlation(block_length: int, phi: float) -> float:
    """Adjacent block means' correlation by summing phi^|i - j| over all index pairs."""
    index = np.arange(2 * block_length)
    rho = phi ** np.abs(index[:, None] - index[None, :])
    within = rho[:block_length, :block_length].sum()
    across = rho[:block_length, block_length:].sum()
    return float(across / within)


@pytest.mark.parametrize(("block_length", "phi"), [(1, 0.7), (5, 0.7), (37, 0.9), (200, 0.95), (3, 0.2)])
def test_block_mean_correlation_equals_the_brute_force_sum(block_length: int, phi: float) -> None:
    """The closed form against direct summation of the AR(1) autocorrelations phi^|i - j|."""
    assert block_mean_correlation(block_length, phi) == pytest.approx(
        _brute_force_block_correlation(block_length, phi), rel=1e-10
    )


def test_block_mean_correlation_matches_simulation() -> None:
    """Lag-1 autocorrelation of 10-sample block means of AR(1) phi = 0.7: within 4 SE (SE ~ 1/sqrt(m))."""
    series = ar1(0.7, (400_000,), seed=6)
    means = block_means(series, 10)
    observed = lag1_autocorrelation(means)
    assert abs(observed - block_mean_correlation(10, 0.7)) < 4 / math.sqrt(means.shape[0])


@pytest.mark.parametrize("phi", [0.05, 0.5, 0.7, 0.95, 0.995])
def test_chosen_block_length_is_the_shortest_that_meets_the_target(phi: float) -> None:
    """The returned length meets the target and one sample less does not."""
    target = 0.025
    length = choose_block_length(phi, target)
    assert block_mean_correlation(length, phi) <= target
    if length > 1:
        assert block_mean_correlation(length - 1, phi) > target


def test_block_means_leave_out_the_incomplete_tail() -> None:
    """Ten values in blocks of three: three means, the tenth value unused."""
    means = block_means(np.arange(10.0), 3)
    np.testing.assert_allclose(means, [1.0, 4.0, 7.0])
