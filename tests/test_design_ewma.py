"""EWMA run lengths from the design engine, against Lucas & Saccucci (1990) and seeded simulation.

Published cells are checked to their printed precision: half a unit in the last printed digit + 0.1 %
of the value (the engine's convergence target). Simulation checks allow 4 standard errors.
"""

from __future__ import annotations

import numpy as np
import pytest

from streamguard.design import arl, run_length
from streamguard.design.ewma_arl import ewma_arl
from streamguard.design.simulation import ewma_runs

SIMULATION_SE = 4.0

# (lambda, L) with in-control ARL 500: Lucas & Saccucci (1990), Technometrics 32, reproduced in
# Montgomery, Introduction to Statistical Quality Control, table of ARLs for several EWMA schemes.
SCHEMES = [(0.05, 2.615), (0.10, 2.814), (0.20, 2.962), (0.25, 2.998), (0.40, 3.054)]

# Shifted ARLs of the same table (from memory), asymptotic limits, zero state.
SHIFTS = [0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 2.5, 3.0, 4.0]
TABLE = {
    (0.40, 3.054): ["224", "71.2", "28.4", "14.3", "5.9", "3.5", "2.5", "2.0", "1.4"],
    (0.25, 2.998): ["170", "48.2", "20.1", "11.1", "5.5", "3.6", "2.7", "2.3", "1.7"],
    (0.20, 2.962): ["150", "41.8", "18.2", "10.5", "5.5", "3.7", "2.9", "2.4", "1.9"],
    (0.10, 2.814): ["106", "31.3", "15.9", "10.3", "6.1", "4.4", "3.4", "2.9", "2.2"],
    (0.05, 2.615): ["84.1", "28.8", "16.4", "11.4", "7.1", "5.2", "4.2", "3.5", "2.7"],
}


def printed_tolerance(printed: str) -> float:
    decimals = len(printed.split(".")[1]) if "." in printed else 0
    return 0.5 * 10.0**-decimals + 1e-3 * float(printed)


@pytest.mark.parametrize(("lam", "L"), SCHEMES)
def test_published_schemes_have_in_control_arl_500(lam: float, L: float) -> None:
    """ARL0 = 500 for the published (lambda, L) (Lucas & Saccucci 1990).

    L is printed to 3 decimals, i.e. the exact L lies within +-0.0005 of it, so 500 must lie between
    the ARLs at L - 0.0005 and L + 0.0005 (widened by the 0.1 % convergence tolerance).
    """
    params = {"lambda": lam, "limits": "asymptotic"}
    low = arl("ewma", params | {"L": L - 0.0005})
    high = arl("ewma", params | {"L": L + 0.0005})
    assert low * (1 - 1e-3) <= 500.0 <= high * (1 + 1e-3)


@pytest.mark.parametrize(("lam", "L"), SCHEMES)
def test_shifted_arls_match_the_published_table(lam: float, L: float) -> None:
    """Out-of-control ARLs of the same schemes (Lucas & Saccucci 1990 via Montgomery; from memory)."""
    for shift, printed in zip(SHIFTS, TABLE[(lam, L)], strict=True):
        value = arl("ewma", {"lambda": lam, "L": L, "limits": "asymptotic"}, shift)
        assert value == pytest.approx(float(printed), abs=printed_tolerance(printed)), (shift, printed)


@pytest.mark.parametrize(("lam", "L", "shift"), [(0.1, 2.814, 0.0), (0.1, 2.814, 1.0), (0.4, 3.054, 0.5)])
def test_exact_limits_chain_matches_simulation(lam: float, L: float, shift: float) -> None:
    """Exact (time-varying) limits: the time-inhomogeneous chain against 20,000 seeded runs, 4 s.e."""
    value = arl("ewma", {"lambda": lam, "L": L, "limits": "exact"}, shift)
    simulated = ewma_runs(lam, L, True, shift, runs=20_000, max_points=10**8, seed=21)
    assert abs(value - simulated.arl) <= SIMULATION_SE * simulated.standard_error


def test_exact_limits_alarm_earlier_than_asymptotic_ones() -> None:
    """Narrower limits on the first points can only add alarms: ARL(exact) < ARL(asymptotic)."""
    for shift in (0.0, 1.0, 3.0):
        exact = arl("ewma", {"lambda": 0.1, "L": 2.814, "limits": "exact"}, shift)
        asymptotic = arl("ewma", {"lambda": 0.1, "L": 2.814, "limits": "asymptotic"}, shift)
        assert exact < asymptotic


def test_asymptotic_chain_matches_simulation_with_run_length_quantiles() -> None:
    """ARL, SDRL and quantiles of lambda = 0.2, L = 2.962 at a 0.75 sigma shift vs 20,000 seeded runs.

    Quantile t_q must satisfy P(N <= t_q) >= q > P(N <= t_q - 1) within 4 binomial standard errors; the
    sample SD's standard error comes from the sample's fourth moment (delta method).
    """
    result = run_length("ewma", {"lambda": 0.2, "L": 2.962, "limits": "asymptotic"}, 0.75)
    runs = ewma_runs(0.2, 2.962, False, 0.75, runs=20_000, max_points=10**8, seed=22).run_lengths
    count = runs.shape[0]
    assert abs(result.arl - runs.mean()) <= SIMULATION_SE * runs.std(ddof=1) / np.sqrt(count)
    for q, t in result.quantiles.items():
        margin = SIMULATION_SE * np.sqrt(q * (1 - q) / count)
        assert np.mean(runs <= t) >= q - margin
        assert np.mean(runs <= t - 1) <= q + margin
    centred = runs - runs.mean()
    variance = np.mean(centred**2)
    sd_error = np.sqrt((np.mean(centred**4) - variance**2) / count) / (2 * np.sqrt(variance))  # delta method
    assert result.sdrl is not None
    assert abs(result.sdrl - runs.std(ddof=1)) <= SIMULATION_SE * sd_error


def test_small_lambda_and_long_arl_still_converge() -> None:
    """lambda = 0.02 with an in-control ARL near 10^5: the Richardson estimate stays under 0.1 %."""
    converged, _ = ewma_arl(0.02, 4.0, "asymptotic", 0.0)
    assert converged.relative_error < 1e-3
    assert 5e4 < converged.value < 2e5


def test_subgroups_scale_the_shift_by_root_n() -> None:
    """A shift delta with subgroups of n is delta*sqrt(n) for single points."""
    params = {"lambda": 0.2, "L": 2.962}
    assert arl("ewma", params, 0.5, subgroup_size=4) == pytest.approx(arl("ewma", params, 1.0))
