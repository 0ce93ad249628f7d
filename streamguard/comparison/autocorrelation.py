"""Serial correlation in plant data, and the two ways ``analysis`` keeps it from faking significance.

Samples a few seconds apart carry much the same information: a t test that counts each as
independent reports a standard error that is too small and a p-value that is far too small.
Two remedies live here, both built on the lag-1 autocorrelation r1 and a first-order
autoregressive (AR(1)) model of the noise:

* the effective sample size n (1 - r1) / (1 + r1): Bayley & Hammersley (1946), J. R. Statist. Soc.
  Suppl. 8:184-197; Wilks, Statistical Methods in the Atmospheric Sciences (3rd ed. 2011), eq. 5.12
  (both from memory);
* non-overlapping block means, with the block length chosen so that the AR(1) model predicts
  nearly uncorrelated means (the batch-means method of simulation output analysis; Schmeiser (1982),
  Operations Research 30:556-568, from memory).
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike

# Keep phi away from 1 so block lengths stay finite; a series this persistent is capped by the caller anyway.
_MAX_PHI = 0.999999


def lag1_autocorrelation(values: ArrayLike) -> float:
    """The usual estimator sum (x_t - m)(x_t+1 - m) / sum (x_t - m)^2 (Box & Jenkins); NaN when undefined."""
    x = np.asarray(values, dtype=np.float64)
    if x.shape[0] < 3:
        return math.nan
    centred = x - x.mean()
    denominator = float(centred @ centred)
    if denominator <= 0:
        return math.nan
    return float(centred[:-1] @ centred[1:]) / denominator


def effective_sample_size(n: float, lag1: float) -> float:
    """n (1 - r1)/(1 + r1) under AR(1); negative or undefined r1 counts as zero, never more than n."""
    if not math.isfinite(lag1) or lag1 <= 0:
        return float(n)
    phi = min(lag1, _MAX_PHI)
    return float(n) * (1.0 - phi) / (1.0 + phi)


def block_mean_correlation(block_length: int, phi: float) -> float:
    """Lag-1 autocorrelation of adjacent non-overlapping block means of an AR(1) series.

    Summing the AR(1) autocorrelation phi^k over the pairs of samples involved, in units of the
    process variance: adjacent block means have covariance phi (1 - phi^b)^2 / (b (1 - phi))^2,
    one block mean has variance (b (1 - phi^2) - 2 phi (1 - phi^b)) / (b (1 - phi))^2; their ratio
    is returned. Equals phi at b = 1 and falls off like phi / (b (1 - phi^2)) for long blocks.
    """
    if block_length < 1:
        raise ValueError("block_length must be at least 1")
    if not math.isfinite(phi) or phi <= 0:
        return 0.0
    phi = min(phi, _MAX_PHI)
    b = float(block_length)
    tail = 1.0 - phi**b
    return phi * tail * tail / (b * (1.0 - phi * phi) - 2.0 * phi * tail)


def choose_block_length(phi: float, target: float) -> int:
    """The shortest block whose means the AR(1) model says are correlated at no more than ``target``."""
    if not 0 < target < 1:
        raise ValueError("target must be between 0 and 1")
    if not math.isfinite(phi) or phi <= target:
        return 1
    low, high = 1, 2
    while block_mean_correlation(high, phi) > target:
        low, high = high, high * 2
    while (
        high - low > 1
    ):  # correlation falls with block length: bisect between a failing and a passing length
        middle = (low + high) // 2
        if block_mean_correlation(middle, phi) > target:
            low = middle
        else:
            high = middle
    return high


def block_means(values: ArrayLike, block_length: int) -> np.ndarray:
    """Means of consecutive non-overlapping blocks; the tail that does not fill a block is left out."""
    x = np.asarray(values, dtype=np.float64)
    blocks = x.shape[0] // block_length
    return x[: blocks * block_length].reshape(blocks, block_length).mean(axis=1)
