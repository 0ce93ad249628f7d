"""Power of two-sided t tests: "do we have enough data?" in both directions.

Given the standard error and degrees of freedom we have, the smallest difference the test would
catch with the wanted power; given a practical threshold, the number of independent samples (or
pairs) needed to catch it. Power is computed exactly from the noncentral t distribution
(``scipy.stats.nct``), not from the normal approximation, so it stays right for small samples.
"""

from __future__ import annotations

import math
from collections.abc import Callable

from scipy import optimize, special

APPROXIMATION = "noncentral t (scipy.stats.nct), two-sided"


def _check(alpha: float, power: float) -> None:
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must be between 0 and 1, not {alpha}")
    if not 0.0 < power < 1.0:
        raise ValueError(f"power must be between 0 and 1, not {power}")


def power_two_sided(noncentrality: float, df: float, alpha: float) -> float:
    """Probability that |T| exceeds the two-sided critical value when T is noncentral t(df, noncentrality)."""
    # scipy.special's nctdtr is the CDF behind scipy.stats.nct, called directly: this runs in a loop.
    critical = float(special.stdtrit(df, 1.0 - alpha / 2.0))
    upper = 1.0 - float(special.nctdtr(df, noncentrality, critical))
    lower = float(special.nctdtr(df, noncentrality, -critical))
    return upper + lower


def detectable_noncentrality(df: float, alpha: float, power: float) -> float:
    """The noncentrality at which the two-sided test at ``alpha`` reaches ``power``."""
    _check(alpha, power)
    if not df > 0:
        return math.nan
    if power <= alpha:  # the test has that much power at zero difference already
        return 0.0
    high = float(special.ndtri(1.0 - alpha / 2.0) + special.ndtri(power)) + 1.0
    while power_two_sided(high, df, alpha) < power:
        high *= 2.0
    return float(optimize.brentq(lambda lam: power_two_sided(lam, df, alpha) - power, 0.0, high, xtol=1e-10))


def detectable_difference(standard_error: float, df: float, alpha: float, power: float) -> float:
    """Smallest true difference found with probability ``power``: noncentrality times the standard error."""
    return detectable_noncentrality(df, alpha, power) * standard_error


def _smallest_n(check: Callable[[int], bool], start: int) -> int:
    """Smallest integer n >= start for which ``check(n)`` holds; power grows with n, so bisect."""
    if check(start):
        return start
    low, high = start, start * 2
    while not check(high):
        low, high = high, high * 2
    while high - low > 1:
        middle = (low + high) // 2
        if check(middle):
            high = middle
        else:
            low = middle
    return high


def required_n_two_sample(difference: float, sd: float, alpha: float, power: float) -> int | None:
    """Per-group size of two equal independent groups (pooled df = 2n - 2) to detect ``difference``."""
    _check(alpha, power)
    if difference == 0 or not math.isfinite(difference) or not math.isfinite(sd):
        return None
    if sd <= 0:
        return 2
    ratio = abs(difference) / sd

    def reaches(n: int) -> bool:
        return power_two_sided(ratio * math.sqrt(n / 2.0), 2.0 * n - 2.0, alpha) >= power

    return _smallest_n(reaches, 2)


def required_n_paired(difference: float, sd_difference: float, alpha: float, power: float) -> int | None:
    """Number of independent pairs (df = n - 1) to detect a mean difference of ``difference``."""
    _check(alpha, power)
    if difference == 0 or not math.isfinite(difference) or not math.isfinite(sd_difference):
        return None
    if sd_difference <= 0:
        return 2
    ratio = abs(difference) / sd_difference

    def reaches(n: int) -> bool:
        return power_two_sided(ratio * math.sqrt(n), n - 1.0, alpha) >= power

    return _smallest_n(reaches, 2)
