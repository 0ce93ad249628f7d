"""CUSUM run lengths from the design engine, against published tables, simulation and Siegmund.

Published values are checked to their printed precision: |computed - printed| <= half a unit in the
last printed digit + 0.1 % of the value (the engine's convergence target). Simulation checks allow
4 standard errors of the simulated mean (a false failure about once in 16,000 runs).
"""

from __future__ import annotations

import statistics
import time

import numpy as np
import pytest

from streamguard.design import arl, run_length, siegmund_arl
from streamguard.design import cusum_arl as cusum
from streamguard.design.markov import converge
from streamguard.design.simulation import cusum_runs

SIMULATION_SE = 4.0


def printed_tolerance(printed: str) -> float:
    decimals = len(printed.split(".")[1]) if "." in printed else 0
    return 0.5 * 10.0**-decimals + 1e-3 * float(printed)


# Lucas & Crosier (1982), Technometrics 24, Table 1 / Montgomery, Introduction to Statistical Quality
# Control, table of two-sided CUSUM ARLs for k = 1/2 (values as printed there; from memory).
H4_TABLE = {
    0.0: "168", 0.25: "74.2", 0.5: "26.6", 0.75: "13.3", 1.0: "8.38",
    1.5: "4.75", 2.0: "3.34", 2.5: "2.62", 3.0: "2.19", 4.0: "1.71",
}  # fmt: skip


@pytest.mark.parametrize("shift", sorted(H4_TABLE))
def test_two_sided_k_half_h4_matches_published_table(shift: float) -> None:
    """Two-sided k = 0.5, h = 4 across shifts (Lucas & Crosier 1982 Table 1; Montgomery's CUSUM table)."""
    printed = H4_TABLE[shift]
    assert arl("cusum", {"k": 0.5, "h": 4.0}, shift) == pytest.approx(float(printed), abs=printed_tolerance(printed))


@pytest.mark.parametrize(
    ("h", "headstart", "shift", "printed"),
    [
        (5.0, 0.0, 0.0, "465"),  # Montgomery's CUSUM table, h = 5 (from memory)
        (5.0, 0.0, 1.0, "10.4"),  # same table
        (4.0, 0.5, 0.0, "149"),  # Lucas & Crosier (1982), FIR headstart h/2 (from memory)
        (5.0, 0.5, 0.0, "430"),  # Lucas & Crosier (1982), FIR headstart h/2 (from memory)
    ],
)
def test_h5_and_headstart_values(h: float, headstart: float, shift: float, printed: str) -> None:
    """h = 5 in control and at one sigma, and the h/2 headstart, as published."""
    value = arl("cusum", {"k": 0.5, "h": h, "headstart": headstart}, shift)
    assert value == pytest.approx(float(printed), abs=printed_tolerance(printed))


def test_one_sided_brook_evans_values() -> None:
    """One-sided k = 0.5, h = 3: 117.59 in control and 3.75 at a 1.5 sigma shift (Brook & Evans 1972)."""
    upper = {"k": 0.5, "h": 3.0, "side": "upper"}
    assert arl("cusum", upper, 0.0) == pytest.approx(117.59, abs=printed_tolerance("117.59"))
    assert arl("cusum", upper, 1.5) == pytest.approx(3.75, abs=printed_tolerance("3.75"))
    # The lower side alone mirrors the upper one.
    assert arl("cusum", {**upper, "side": "lower"}, -1.5) == pytest.approx(arl("cusum", upper, 1.5), rel=1e-9)


@pytest.mark.parametrize(("headstart", "shift"), [(0.0, 0.0), (0.0, 0.75), (0.5, 0.0), (0.5, 1.0)])
def test_combined_sides_equal_the_two_dimensional_chain(headstart: float, shift: float) -> None:
    """The one-sided combination is exact for headstart*h <= h/2 + k: the independent 2-D chain agrees."""
    k, h = 0.5, 4.0
    combined, _ = cusum.cusum_arl(k, h, headstart, shift)
    two_dimensional = converge(lambda m: cusum.two_sided_chain(k, h, shift, m, headstart * h).arl(), 8, 1e-3, 96)
    assert two_dimensional.relative_error < 1e-3
    assert combined.value == pytest.approx(two_dimensional.value, rel=2e-3)


def test_naive_reciprocal_sum_is_wrong_with_a_headstart() -> None:
    """1/ARL = 1/ARL+ + 1/ARL- with headstart one-sided ARLs misses the renewal; the engine does not use it."""
    k, h, start = 0.5, 4.0, 2.0
    upper = converge(lambda m: cusum.one_sided_chain(k, h, 0.0, m, start).arl(), 16, 1e-4, 3200).value
    naive = upper / 2.0
    exact, _ = cusum.cusum_arl(k, h, 0.5, 0.0)
    assert abs(naive - exact.value) / exact.value > 0.05


def test_large_headstart_uses_the_two_dimensional_chain_and_matches_simulation() -> None:
    """Headstart 0.9 h > h/2 + k: the 2-D chain against 20,000 simulated runs (4 standard errors)."""
    k, h, headstart = 0.5, 4.0, 0.9
    converged, method = cusum.cusum_arl(k, h, headstart, 0.0)
    assert "two-dimensional" in method
    assert converged.relative_error <= 1e-3
    simulated = cusum_runs(k, h, headstart, 0.0, runs=20_000, max_points=10**8, seed=11)
    assert abs(converged.value - simulated.arl) <= SIMULATION_SE * simulated.standard_error


def test_run_length_distribution_matches_simulation() -> None:
    """SDRL and quantiles of the two-sided chart (2-D chain) against 20,000 seeded simulated runs.

    A chain quantile t_q must satisfy P(N <= t_q) >= q > P(N <= t_q - 1); the empirical CDF may miss
    these by 4 binomial standard errors sqrt(q(1-q)/runs). The sample SD's standard error is estimated
    by the delta method from the sample's fourth moment.
    """
    result = run_length("cusum", {"k": 0.5, "h": 4.0}, shift=0.5)
    runs = cusum_runs(0.5, 4.0, 0.0, 0.5, runs=20_000, max_points=10**8, seed=12).run_lengths
    count = runs.shape[0]
    for q, t in result.quantiles.items():
        margin = SIMULATION_SE * np.sqrt(q * (1 - q) / count)
        assert np.mean(runs <= t) >= q - margin
        assert np.mean(runs <= t - 1) <= q + margin
    centred = runs - runs.mean()
    variance = np.mean(centred**2)
    sd_error = np.sqrt((np.mean(centred**4) - variance**2) / count) / (2 * np.sqrt(variance))
    assert result.sdrl is not None
    assert abs(result.sdrl - runs.std(ddof=1)) <= SIMULATION_SE * sd_error


def test_steady_state_arl_matches_simulation_after_a_long_in_control_run() -> None:
    """Conditional steady state: 300 in-control points without a false alarm, then a 1 sigma shift.

    Vectorised seeded simulation of the two-sided CUSUM; runs that alarm during the warm-up are dropped,
    which is exactly the conditioning of the quasi-stationary distribution.
    """
    result = run_length("cusum", {"k": 0.5, "h": 4.0}, shift=1.0)
    generator = np.random.default_rng(13)
    runs = 40_000
    upper, lower = np.zeros(runs), np.zeros(runs)
    alive = np.ones(runs, bool)
    for _ in range(300):
        z = generator.standard_normal(runs)
        upper = np.maximum(0.0, upper + z - 0.5)
        lower = np.maximum(0.0, lower - z - 0.5)
        alive &= (upper <= 4.0) & (lower <= 4.0)
    upper, lower = upper[alive], lower[alive]
    lengths = np.zeros(upper.shape[0])
    running = np.ones(upper.shape[0], bool)
    step = 0
    while running.any():
        step += 1
        z = generator.standard_normal(upper.shape[0]) + 1.0
        upper = np.where(running, np.maximum(0.0, upper + z - 0.5), upper)
        lower = np.where(running, np.maximum(0.0, lower - z - 0.5), lower)
        signalled = running & ((upper > 4.0) | (lower > 4.0))
        lengths[signalled] = step
        running &= ~signalled
    standard_error = lengths.std(ddof=1) / np.sqrt(lengths.shape[0])
    assert result.steady_state_arl is not None
    assert abs(result.steady_state_arl - lengths.mean()) <= SIMULATION_SE * standard_error


@pytest.mark.parametrize("h", [3.0, 4.0, 5.0])
@pytest.mark.parametrize("shift", [0.0, 0.25, 0.5, 1.0])
def test_siegmund_approximation_agrees_within_its_accuracy(h: float, shift: float) -> None:
    """Siegmund's corrected diffusion approximation (Siegmund 1985, Sequential Analysis) within 1.5 %.

    Replacing h by h + 1.166 corrects for the overshoot of the boundary; the correction is derived for
    small drift |shift - k|, and for drifts up to half a sigma it is known to be within about 1 % of exact
    ARLs (from memory: Siegmund 1985; Woodall & Adams 1993, J. Quality Technology 25). It degrades for
    large shifts, where a run lasts only a few points, so those are not checked here.
    """
    exact = arl("cusum", {"k": 0.5, "h": h}, shift)
    assert siegmund_arl(0.5, h, shift) == pytest.approx(exact, rel=0.015)


def test_subgroups_scale_the_shift_by_root_n() -> None:
    """A shift delta with subgroups of n is the shift delta*sqrt(n) for single points (the definition of z)."""
    params = {"k": 0.5, "h": 5.0}
    for n in (2, 4, 9):
        assert arl("cusum", params, 0.5, subgroup_size=n) == pytest.approx(arl("cusum", params, 0.5 * np.sqrt(n)))


def test_subgroup_scaling_agrees_with_simulated_subgroup_means() -> None:
    """Means of 4 raw N(0.5, 1) values, standardized by sigma/sqrt(4), fed to the CUSUM: 4 standard errors."""
    expected = arl("cusum", {"k": 0.5, "h": 4.0}, 0.5, subgroup_size=4)
    generator = np.random.default_rng(14)
    lengths = []
    for _ in range(4000):
        upper = lower = 0.0
        points = 0
        means = (generator.standard_normal((200, 4)) + 0.5).mean(axis=1) * 2.0  # z = xbar / (1/sqrt(4))
        for z in means:
            points += 1
            upper = max(0.0, upper + z - 0.5)
            lower = max(0.0, lower - z - 0.5)
            if upper > 4.0 or lower > 4.0:
                break
        lengths.append(points)
    sample = np.asarray(lengths, float)
    assert abs(sample.mean() - expected) <= SIMULATION_SE * sample.std(ddof=1) / np.sqrt(sample.shape[0])


def test_two_sided_arl_is_fast() -> None:
    """Two-sided CUSUM ARL converged to 0.1 % in well under 100 ms (median of 7 calls)."""
    arl("cusum", {"k": 0.5, "h": 5.0}, 1.0)
    timings = []
    for shift in (0.0, 0.25, 0.5, 1.0, 1.5, 2.0, 3.0):
        started = time.perf_counter()
        arl("cusum", {"k": 0.5, "h": 5.0}, shift)
        timings.append(time.perf_counter() - started)
    assert statistics.median(timings) < 0.1
