"""Student's t tests on means: Welch's unequal-variance test, the pooled test, and the paired test.

Each test has a from-summary form (means, standard deviations, sizes) so published examples that
give only summaries can be checked, and so the effective-size correction in ``analysis`` can pass
a non-integer n. The sign follows ``scipy.stats.ttest_ind(first, second)``: ``mean_first - mean_second``.

Sources: Welch (1947) Biometrika 34:28-35 and Satterthwaite (1946) Biometrics Bulletin 2:110-114
for the degrees of freedom; Student (1908) for the pooled and paired tests.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike
from scipy import special

from .records import EffectSize, Equivalence, PairedTest, TwoSampleTest


def _check_confidence(confidence: float) -> None:
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be between 0 and 1 (e.g. 0.95), not {confidence}")


def _t_ratio(difference: float, standard_error: float) -> float:
    """t with the degenerate case spelled out: two constant samples give 0/0 (undefined) or x/0 (infinite)."""
    if standard_error > 0:
        return difference / standard_error
    if difference == 0:
        return math.nan
    return math.copysign(math.inf, difference)


def _two_sided_p(t: float, df: float) -> float:
    if math.isnan(t) or math.isnan(df):
        return math.nan
    return float(2.0 * special.stdtr(df, -abs(t)))


def _interval(center: float, standard_error: float, df: float, confidence: float) -> tuple[float, float]:
    if math.isnan(df) or df <= 0:
        return math.nan, math.nan
    half = float(special.stdtrit(df, 0.5 + confidence / 2.0)) * standard_error
    return center - half, center + half


def welch_from_summary(
    mean_first: float,
    sd_first: float,
    n_first: float,
    mean_second: float,
    sd_second: float,
    n_second: float,
    *,
    confidence: float = 0.95,
) -> TwoSampleTest:
    """Welch's test; n may be an effective size, which is why it is a float here."""
    _check_confidence(confidence)
    if n_first < 2 or n_second < 2:
        raise ValueError(f"each sample needs n >= 2 (got {n_first:g} and {n_second:g})")
    share_first = sd_first**2 / n_first
    share_second = sd_second**2 / n_second
    standard_error = math.sqrt(share_first + share_second)
    denominator = share_first**2 / (n_first - 1) + share_second**2 / (n_second - 1)
    df = (share_first + share_second) ** 2 / denominator if denominator > 0 else math.nan
    difference = mean_first - mean_second
    t = _t_ratio(difference, standard_error)
    low, high = _interval(difference, standard_error, df, confidence)
    return TwoSampleTest(
        "Welch", float(n_first), float(n_second), float(mean_first), float(mean_second),
        float(sd_first), float(sd_second), float(difference), standard_error, confidence,
        low, high, t, df, _two_sided_p(t, df),
    )  # fmt: skip


def pooled_sd(sd_first: float, n_first: float, sd_second: float, n_second: float) -> float:
    """The pooled standard deviation, each variance weighted by its degrees of freedom."""
    return math.sqrt(((n_first - 1) * sd_first**2 + (n_second - 1) * sd_second**2) / (n_first + n_second - 2))


def pooled_from_summary(
    mean_first: float,
    sd_first: float,
    n_first: float,
    mean_second: float,
    sd_second: float,
    n_second: float,
    *,
    confidence: float = 0.95,
) -> TwoSampleTest:
    """The equal-variance test: right when the spreads agree, wrong-sized when they do not and n differ."""
    _check_confidence(confidence)
    if n_first < 2 or n_second < 2:
        raise ValueError(f"each sample needs n >= 2 (got {n_first:g} and {n_second:g})")
    spread = pooled_sd(sd_first, n_first, sd_second, n_second)
    standard_error = spread * math.sqrt(1.0 / n_first + 1.0 / n_second)
    df = float(n_first + n_second - 2)
    difference = mean_first - mean_second
    t = _t_ratio(difference, standard_error)
    low, high = _interval(difference, standard_error, df, confidence)
    return TwoSampleTest(
        "pooled", float(n_first), float(n_second), float(mean_first), float(mean_second),
        float(sd_first), float(sd_second), float(difference), standard_error, confidence,
        low, high, t, df, _two_sided_p(t, df),
    )  # fmt: skip


def _summary(values: ArrayLike) -> tuple[float, float, int]:
    array = np.asarray(values, dtype=np.float64)
    n = int(array.shape[0])
    if n < 2:
        raise ValueError(f"a sample needs at least 2 values, got {n}")
    return float(array.mean()), float(array.std(ddof=1)), n


def welch_test(first: ArrayLike, second: ArrayLike, *, confidence: float = 0.95) -> TwoSampleTest:
    """Welch's test on raw values, treating every value as independent."""
    mean_a, sd_a, n_a = _summary(first)
    mean_b, sd_b, n_b = _summary(second)
    return welch_from_summary(mean_a, sd_a, n_a, mean_b, sd_b, n_b, confidence=confidence)


def pooled_test(first: ArrayLike, second: ArrayLike, *, confidence: float = 0.95) -> TwoSampleTest:
    """The pooled test on raw values, treating every value as independent."""
    mean_a, sd_a, n_a = _summary(first)
    mean_b, sd_b, n_b = _summary(second)
    return pooled_from_summary(mean_a, sd_a, n_a, mean_b, sd_b, n_b, confidence=confidence)


def paired_from_summary(
    mean_difference: float, sd_difference: float, n: float, *, confidence: float = 0.95
) -> PairedTest:
    """The t test on the mean of n differences; n may be an effective size."""
    _check_confidence(confidence)
    if n < 2:
        raise ValueError(f"a paired test needs n >= 2 pairs (got {n:g})")
    standard_error = sd_difference / math.sqrt(n)
    df = float(n - 1)
    t = _t_ratio(mean_difference, standard_error)
    low, high = _interval(mean_difference, standard_error, df, confidence)
    return PairedTest(
        float(n), float(mean_difference), float(sd_difference), standard_error, confidence,
        low, high, t, df, _two_sided_p(t, df),
    )  # fmt: skip


def paired_test(first: ArrayLike, second: ArrayLike, *, confidence: float = 0.95) -> PairedTest:
    """Paired test of ``first - second`` element by element (the sign of ``scipy.stats.ttest_rel``)."""
    a = np.asarray(first, dtype=np.float64)
    b = np.asarray(second, dtype=np.float64)
    if a.shape != b.shape:
        raise ValueError(f"paired samples must have the same length ({a.shape[0]} vs {b.shape[0]})")
    mean, sd, n = _summary(a - b)
    return paired_from_summary(mean, sd, n, confidence=confidence)


def hedges_correction(df: float) -> float:
    """Hedges (1981) small-sample factor J = 1 - 3/(4 df - 1), df = n1 + n2 - 2; removes d's upward bias."""
    return 1.0 - 3.0 / (4.0 * df - 1.0) if df > 1 else math.nan


def two_sample_effect_size(
    mean_first: float, sd_first: float, n_first: int, mean_second: float, sd_second: float, n_second: int
) -> EffectSize:
    """Cohen's d on the pooled SD of individual values, and Hedges' g = J d."""
    spread = pooled_sd(sd_first, n_first, sd_second, n_second)
    difference = mean_first - mean_second
    d = _t_ratio(difference, spread) if spread > 0 or difference != 0 else math.nan
    return EffectSize(
        cohen_d=d,
        hedges_g=d * hedges_correction(n_first + n_second - 2),
        standardiser="pooled SD of individual samples (Cohen's d); g = d (1 - 3/(4(n1+n2)-9)) (Hedges 1981)",
    )


def paired_effect_size(mean_difference: float, sd_difference: float, n: int) -> EffectSize:
    """Cohen's d_z: the mean difference over the SD of the differences; Hedges' J with df = n - 1."""
    d = _t_ratio(mean_difference, sd_difference) if sd_difference > 0 or mean_difference != 0 else math.nan
    return EffectSize(
        cohen_d=d,
        hedges_g=d * hedges_correction(n - 1),
        standardiser="SD of the individual differences (Cohen's d_z); g = d_z (1 - 3/(4(n-1)-1))",
    )


def equivalence_test(
    difference: float, standard_error: float, df: float, margin: float, alpha: float
) -> Equivalence:
    """Two one-sided tests against +-margin (Schuirmann 1987), on any t test's difference, SE and df.

    "No significant difference" is not evidence of agreement; this is: it rejects "the difference
    is at least ``margin``" in both directions.
    """
    if not margin > 0:
        raise ValueError(f"the equivalence margin must be greater than zero, not {margin}")
    if not 0.0 < alpha < 0.5:
        raise ValueError(f"alpha must be between 0 and 0.5 for an equivalence test, not {alpha}")
    if standard_error > 0 and df > 0:
        p_above_lower = float(special.stdtr(df, -(difference + margin) / standard_error))
        p_below_upper = float(special.stdtr(df, (difference - margin) / standard_error))
        p_value = max(p_above_lower, p_below_upper)
    else:
        p_value = 0.0 if abs(difference) < margin else 1.0
    confidence = 1.0 - 2.0 * alpha
    low, high = _interval(difference, standard_error, df, confidence)
    return Equivalence(margin, confidence, low, high, p_value, bool(p_value < alpha))
