"""Seeded simulation of zero-state run lengths, for what has no finite Markov chain and for cross-checks.

Each run starts from the detector's start state, draws N(mean, 1) points until the first signal and
records how many it took; the detectors restart after a signal, so successive runs are independent.
The loops are compiled with numba and follow the detector kernels' rules line for line (see
``detectors/``). The ARL estimate is the mean run length; its standard error is SDRL / sqrt(runs).
numba's generator is seeded inside the compiled code, so a seed gives the same runs every time.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from .results import DEFAULT_QUANTILES, RunLength

DEFAULT_SEED = 20_240_601

# Bit positions of the rules in the mask handed to the compiled Shewhart loop.
_RULE_BITS = {
    "we1": 0, "nelson1": 0, "we2": 1, "nelson5": 1, "we3": 2, "nelson6": 2, "we4": 3,
    "nelson2": 4, "nelson3": 5, "nelson4": 6, "nelson7": 7, "nelson8": 8,
}  # fmt: skip


@dataclass(frozen=True)
class SimulatedRunLengths:
    run_lengths: np.ndarray

    @property
    def arl(self) -> float:
        return float(self.run_lengths.mean())

    @property
    def standard_error(self) -> float:
        return float(self.run_lengths.std(ddof=1) / math.sqrt(self.run_lengths.shape[0]))


@njit(cache=True)
def _count_bits(value):
    count = 0
    while value:
        count += value & 1
        value >>= 1
    return count


@njit(cache=True)
def _shewhart_runs(limit, mask, run_length, mean, runs, max_points, seed):
    np.random.seed(seed)
    lengths = np.zeros(runs, np.int64)
    used = 0
    for r in range(runs):
        above2 = below2 = above1 = below1 = 0
        side_run = trend_run = alternating_run = last_difference = inner_run = outer_run = 0
        previous = 0.0
        n = 0
        while True:
            x = np.random.standard_normal() + mean
            n += 1
            above2 = ((above2 << 1) | (1 if x > 2.0 else 0)) & 0x7
            below2 = ((below2 << 1) | (1 if x < -2.0 else 0)) & 0x7
            above1 = ((above1 << 1) | (1 if x > 1.0 else 0)) & 0x1F
            below1 = ((below1 << 1) | (1 if x < -1.0 else 0)) & 0x1F
            if x > 0.0:
                side_run = side_run + 1 if side_run > 0 else 1
            elif x < 0.0:
                side_run = side_run - 1 if side_run < 0 else -1
            else:
                side_run = 0
            if n > 1:
                sign = 1 if x > previous else (-1 if x < previous else 0)
                if sign > 0:
                    trend_run = trend_run + 1 if trend_run > 0 else 1
                elif sign < 0:
                    trend_run = trend_run - 1 if trend_run < 0 else -1
                else:
                    trend_run = 0
                if sign != 0 and sign == -last_difference:
                    alternating_run += 1
                elif sign != 0:
                    alternating_run = 1
                else:
                    alternating_run = 0
                last_difference = sign
            previous = x
            inner_run = inner_run + 1 if abs(x) < 1.0 else 0
            outer_run = outer_run + 1 if abs(x) > 1.0 else 0
            signal = (
                (mask & 1 and abs(x) > limit)
                or (mask & 2 and (_count_bits(above2) >= 2 or _count_bits(below2) >= 2))
                or (mask & 4 and (_count_bits(above1) >= 4 or _count_bits(below1) >= 4))
                or (mask & 8 and abs(side_run) >= run_length)
                or (mask & 16 and abs(side_run) >= 9)
                or (mask & 32 and abs(trend_run) >= 5)
                or (mask & 64 and alternating_run >= 13)
                or (mask & 128 and inner_run >= 15)
                or (mask & 256 and outer_run >= 8)
            )
            if signal:
                break
        lengths[r] = n
        used += n
        if used >= max_points:
            return lengths[: r + 1]
    return lengths


@njit(cache=True)
def _cusum_runs(k, h, start, mean, two_sided, runs, max_points, seed):
    np.random.seed(seed)
    lengths = np.zeros(runs, np.int64)
    used = 0
    for r in range(runs):
        upper = start
        lower = start
        n = 0
        while True:
            x = np.random.standard_normal() + mean
            n += 1
            upper = max(0.0, upper + x - k)
            lower = max(0.0, lower - x - k)
            if upper > h or (two_sided and lower > h):
                break
        lengths[r] = n
        used += n
        if used >= max_points:
            return lengths[: r + 1]
    return lengths


@njit(cache=True)
def _ewma_runs(lam, L, exact, mean, runs, max_points, seed):
    np.random.seed(seed)
    lengths = np.zeros(runs, np.int64)
    used = 0
    asymptotic = lam / (2.0 - lam)
    for r in range(runs):
        e = 0.0
        n = 0
        while True:
            x = np.random.standard_normal() + mean
            n += 1
            e = lam * x + (1.0 - lam) * e
            variance = asymptotic
            if exact and n < 100000:
                variance *= 1.0 - (1.0 - lam) ** (2 * n)
            if abs(e) > L * np.sqrt(variance):
                break
        lengths[r] = n
        used += n
        if used >= max_points:
            return lengths[: r + 1]
    return lengths


def _finish(lengths: np.ndarray) -> SimulatedRunLengths:
    if lengths.shape[0] < 2:
        raise ArithmeticError("fewer than two completed runs: the ARL is too long to simulate")
    return SimulatedRunLengths(lengths.astype(np.float64))


def shewhart_runs(limit: float, rules: tuple[str, ...], run_length: int, mean: float, runs: int,
                  max_points: int, seed: int) -> SimulatedRunLengths:  # fmt: skip
    mask = 0
    for rule in rules:
        mask |= 1 << _RULE_BITS[rule]
    return _finish(_shewhart_runs(float(limit), mask, int(run_length), float(mean), runs, max_points, seed))


def cusum_runs(k: float, h: float, headstart: float, mean: float, runs: int, max_points: int, seed: int,
               two_sided: bool = True) -> SimulatedRunLengths:  # fmt: skip
    """Two-sided, or the upper side alone (the lower side is the upper one with -mean)."""
    return _finish(_cusum_runs(float(k), float(h), float(headstart * h), float(mean), two_sided, runs,
                               max_points, seed))  # fmt: skip


def ewma_runs(lam: float, L: float, exact: bool, mean: float, runs: int, max_points: int,
              seed: int) -> SimulatedRunLengths:  # fmt: skip
    return _finish(_ewma_runs(float(lam), float(L), bool(exact), float(mean), runs, max_points, seed))


def simulate_shewhart(limit: float, rules: tuple[str, ...], run_length: int, shift: float, chart_shift: float,
                      quantiles: tuple[float, ...] = DEFAULT_QUANTILES, runs: int = 20_000,
                      max_points: int = 20_000_000, seed: int | None = None) -> RunLength:  # fmt: skip
    """Shewhart run lengths by simulation; the seed is fixed unless given, so results repeat."""
    seed = DEFAULT_SEED if seed is None else seed
    result = shewhart_runs(limit, rules, run_length, chart_shift, runs, max_points, seed)
    lengths = result.run_lengths
    count = lengths.shape[0]
    return RunLength(
        detector="shewhart",
        shift=shift,
        chart_shift=chart_shift,
        arl=result.arl,
        tolerance=2.0 * result.standard_error / result.arl,
        method=f"seeded simulation ({count:,} runs, seed {seed})",
        sdrl=float(lengths.std(ddof=1)),
        quantiles={q: int(np.quantile(lengths, q, method="inverted_cdf")) for q in quantiles},
        standard_error=result.standard_error,
        notes=("nelson3/nelson4 compare successive values: no finite Markov chain, so simulated",),
    )
