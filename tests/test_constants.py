"""Chart constants against the published factor table.

Reference: the table of factors for constructing variables control charts printed in ASTM E2587 and in
Montgomery, Introduction to Statistical Quality Control, Appendix VI. The n = 2..20 rows were read from
a stored copy of such a table (d2, d3 to 3 decimals, c4 to 4); d3(25) = 0.708 is from memory, d2(25) and
c4(25) were read. A check passes when the computed constant rounds to the printed digits.
"""

from __future__ import annotations

import math
import time

import numpy as np
import pytest
from scipy import integrate, stats

from streamguard import constants

# n: (d2, d3, c4) as printed (ASTM E2587 / Montgomery Appendix VI)
PUBLISHED = {
    2: (1.128, 0.853, 0.7979),
    3: (1.693, 0.888, 0.8862),
    4: (2.059, 0.880, 0.9213),
    5: (2.326, 0.864, 0.9400),
    6: (2.534, 0.848, 0.9515),
    7: (2.704, 0.833, 0.9594),
    8: (2.847, 0.820, 0.9650),
    9: (2.970, 0.808, 0.9693),
    10: (3.078, 0.797, 0.9727),
    25: (3.931, 0.708, 0.9896),  # d3(25) from memory
}


@pytest.mark.parametrize("n", sorted(PUBLISHED))
def test_constants_round_to_the_printed_table(n: int) -> None:
    """Each constant agrees with the table to the digits printed there (half a unit in the last place)."""
    d2, d3, c4 = PUBLISHED[n]
    assert abs(constants.d2(n) - d2) <= 0.0005 + 1e-12
    assert abs(constants.d3(n) - d3) <= 0.0005 + 1e-12
    assert abs(constants.c4(n) - c4) <= 0.00005 + 1e-12


def test_two_point_constants_have_closed_forms() -> None:
    """For n = 2 the range is |X1 - X2| ~ half-normal with scale sqrt(2): d2 = 2/sqrt(pi), d3 = sqrt(2 - 4/pi).

    Source: the half-normal mean and variance (any probability text); c4(2) = sqrt(2/pi).
    """
    assert constants.d2(2) == pytest.approx(2.0 / math.sqrt(math.pi), rel=1e-10)
    assert constants.d3(2) == pytest.approx(math.sqrt(2.0 - 4.0 / math.pi), rel=1e-8)
    assert constants.c4(2) == pytest.approx(math.sqrt(2.0 / math.pi), rel=1e-12)


def test_range_moments_match_scipy_range_distribution() -> None:
    """d2 and d3 equal the moments of the range distribution that scipy computes independently.

    scipy.stats.studentized_range with df=inf is the distribution of the range of n standard normals;
    its moments follow from the survival function: E[R] = int S(r) dr, E[R^2] = int 2 r S(r) dr.
    """
    r = np.linspace(0.0, 12.0, 2401)
    for n in (3, 7, 25):
        survival = stats.studentized_range(n, np.inf).sf(r)
        mean = integrate.simpson(survival, x=r)
        second = integrate.simpson(2.0 * r * survival, x=r)
        assert constants.d2(n) == pytest.approx(mean, rel=1e-8)
        assert constants.d3(n) == pytest.approx(math.sqrt(second - mean**2), rel=1e-8)


def test_c4_is_the_expected_sample_standard_deviation() -> None:
    """c4 = E[s]; check against the chi distribution mean from scipy: E[s] = E[chi_{n-1}] / sqrt(n-1)."""
    for n in (2, 5, 40):
        assert constants.c4(n) == pytest.approx(stats.chi(n - 1).mean() / math.sqrt(n - 1), rel=1e-12)


def test_bad_sizes_are_refused() -> None:
    """A subgroup of one has no range and no standard deviation."""
    for bad in (1, 0, 2.5):
        with pytest.raises(ValueError):
            constants.d2(bad)


def test_constants_are_fast() -> None:
    """All eleven sizes of the table computed from scratch in well under half a second."""
    for function in (constants.d2, constants.d3, constants.c4, constants._range_second_moment):
        function.cache_clear()
    started = time.perf_counter()
    for n in list(range(2, 11)) + [25]:
        constants.d2(n), constants.d3(n), constants.c4(n)
    assert time.perf_counter() - started < 0.5
