"""Each detector's compiled kernel against a plain-Python rendering of its published definition,
step by step, and against worked examples."""

from __future__ import annotations

import math

import numpy as np
import pytest

from streamguard.detectors.cusum import CusumParams, CusumState, run_cusum
from streamguard.detectors.ewma import EwmaParams, EwmaState, run_ewma
from streamguard.detectors.shewhart import ShewhartParams, ShewhartState, rule_mask, rule_order, run_shewhart
from streamguard.detectors.spread import SpreadParams, SpreadState, run_spread

RNG_SEED = 20261202


def _one_tag(n: int) -> tuple[np.ndarray, np.ndarray]:
    return np.zeros(n, np.int32), np.zeros(n, np.bool_)


def test_cusum_matches_page_recursion_step_by_step() -> None:
    """Tabular CUSUM (Page 1954) with restart to the headstart after each signal, at every point."""
    rng = np.random.default_rng(RNG_SEED)
    z = rng.normal(0.3, 1.0, 5000)
    k, h, f = 0.5, 4.0, 0.5
    params, state = CusumParams(1), CusumState(1)
    params.k[0], params.h[0], params.headstart[0] = k, h, f
    tag, restart = _one_tag(z.size)
    out = run_cusum(tag, z, restart, params, state, trace=True)
    upper = lower = f * h
    for i, x in enumerate(z):
        upper = max(0.0, upper + x - k)
        lower = max(0.0, lower - x - k)
        signal = upper > h or lower > h
        assert out.trace_code[i] == (1 if signal else 0)
        expected = upper if upper >= lower else -lower
        assert out.trace_statistic[i] == pytest.approx(expected, abs=1e-12)
        if signal:
            upper = lower = f * h


def test_cusum_worked_example_signals_at_observation_29() -> None:
    """Montgomery, Introduction to SQC, tabular CUSUM example (mu0 = 10, sigma = 1, k = 0.5, h = 5):
    C+ first exceeds h at observation 29 (C+_29 = 5.28). Data and result from memory."""
    x = np.array([9.45, 7.99, 9.29, 11.66, 12.16, 10.18, 8.04, 11.46, 9.20, 10.34, 9.03, 11.47, 10.51, 9.40,
                  10.08, 9.37, 10.62, 10.31, 8.52, 10.84, 10.90, 9.33, 12.29, 11.50, 10.60, 11.08, 10.38,
                  11.62, 11.31, 10.52])  # fmt: skip
    params, state = CusumParams(1), CusumState(1)
    tag, restart = _one_tag(x.size)
    out = run_cusum(tag, x - 10.0, restart, params, state, trace=True)
    assert int(np.flatnonzero(out.trace_code)[0]) + 1 == 29
    assert out.trace_statistic[28] == pytest.approx(5.28, abs=0.005)


@pytest.mark.parametrize("exact", [True, False])
def test_ewma_matches_roberts_recursion_and_limits(exact: bool) -> None:
    """EWMA (Roberts 1959) with exact or asymptotic limits (Lucas & Saccucci 1990), restart after signal."""
    rng = np.random.default_rng(RNG_SEED + 1)
    z = rng.normal(0.4, 1.0, 3000)
    lam, L = 0.1, 2.7
    params, state = EwmaParams(1), EwmaState(1)
    params.lam[0], params.L[0], params.exact[0] = lam, L, exact
    tag, restart = _one_tag(z.size)
    out = run_ewma(tag, z, restart, params, state, trace=True)
    e, i_since = 0.0, 0
    for i, x in enumerate(z):
        i_since += 1
        e = lam * x + (1 - lam) * e
        var = lam / (2 - lam) * ((1 - (1 - lam) ** (2 * i_since)) if exact else 1.0)
        bound = L * math.sqrt(var)
        assert out.trace_statistic[i] == pytest.approx(e, abs=1e-12)
        assert out.trace_limit[i] == pytest.approx(bound, rel=1e-12)
        assert out.trace_code[i] == (1 if abs(e) > bound else 0)
        if abs(e) > bound:
            e, i_since = 0.0, 0


def _monotone(w: list[float]) -> bool:
    pairs = list(zip(w, w[1:], strict=False))
    return all(b > a for a, b in pairs) or all(b < a for a, b in pairs)


def _reference_rules(z: np.ndarray, rules: list[str], limit: float = 3.0, run_length: int = 8) -> list[str]:
    """Western Electric (1956) and Nelson (1984) rules read literally over a list of points;
    the history restarts after any signal."""
    history: list[float] = []
    fired: list[str] = []
    for x in z:
        history.append(float(x))
        h = history
        hit = ""
        def last(m: int, h: list[float] = h) -> list[float] | None:
            return h[-m:] if len(h) >= m else None

        for rule in rules:
            if rule in ("we1", "nelson1") and abs(x) > limit:
                hit = rule
            elif rule in ("we2", "nelson5") and (w := last(3)) is not None and (
                    sum(v > 2 for v in w) >= 2 or sum(v < -2 for v in w) >= 2):
                hit = rule
            elif rule in ("we2", "nelson5") and len(h) == 2 and (all(v > 2 for v in h) or all(v < -2 for v in h)):
                hit = rule
            elif rule in ("we3", "nelson6") and (w := h[-5:]) and (
                    sum(v > 1 for v in w) >= 4 or sum(v < -1 for v in w) >= 4):
                hit = rule
            elif rule in ("we4", "nelson2"):
                m = run_length if rule == "we4" else 9
                if (w := last(m)) is not None and (all(v > 0 for v in w) or all(v < 0 for v in w)):
                    hit = rule
            elif rule == "nelson3" and (w := last(6)) is not None and (
                    _monotone(w)):
                hit = rule
            elif rule == "nelson4" and (w := last(14)) is not None:
                d = np.sign(np.diff(w))
                if np.all(d != 0) and np.all(d[1:] == -d[:-1]):
                    hit = rule
            elif rule == "nelson7" and (w := last(15)) is not None and all(abs(v) < 1 for v in w):
                hit = rule
            elif rule == "nelson8" and (w := last(8)) is not None and all(abs(v) > 1 for v in w):
                hit = rule
            if hit:
                break
        fired.append(hit)
        if hit:
            history = []
    return fired


@pytest.mark.parametrize("rules", [
    ["we1", "we2", "we3", "we4"],
    ["nelson1", "nelson2", "nelson3", "nelson4", "nelson5", "nelson6", "nelson7", "nelson8"],
    ["nelson7", "nelson4", "nelson3"],
])  # fmt: skip
def test_run_rules_match_literal_reading(rules: list[str]) -> None:
    """Bit-history run rules give the same verdict as the rules read literally, point by point."""
    rng = np.random.default_rng(RNG_SEED + 2)
    # A mix of in-control noise, shifts, a damped stretch and an alternating stretch exercises every rule.
    parts = [rng.normal(0, 1, 800), rng.normal(1.2, 1, 300), rng.normal(0, 0.3, 200),
             np.tile([1.5, -1.5], 50) + rng.normal(0, 0.1, 100), np.cumsum(rng.normal(0.3, 0.2, 60)) - 6]  # fmt: skip
    z = np.concatenate(parts)
    params, state = ShewhartParams(1), ShewhartState(1)
    params.order[0] = rule_order(tuple(rules))
    params.mask[0] = rule_mask(tuple(rules))
    tag, restart = _one_tag(z.size)
    out = run_shewhart(tag, z, restart, params, state, trace=True)
    names = ["", "we1", "we2", "we3", "we4", "nelson1", "nelson2", "nelson3", "nelson4", "nelson5",
             "nelson6", "nelson7", "nelson8"]  # fmt: skip
    got = [names[c] for c in out.trace_code]
    expected = _reference_rules(z, rules)
    assert got == expected
    assert len({r for r in got if r}) >= 3  # the data really exercises several rules


def test_moving_range_limit_uses_d2_d3_for_n_2() -> None:
    """Moving-range UCL = d2(2) + 3 d3(2) = 1.128 + 3 * 0.853 = 3.686 sigma (ASTM E2587 / Montgomery App. VI)."""
    params, state = SpreadParams(1), SpreadState(1)
    x = np.array([0.0, 3.6, 0.0, 3.8])
    tag, restart = _one_tag(x.size)
    out = run_spread(tag, x, np.full(4, np.nan), np.ones(4, np.int32), np.ones(1), restart, params, state, trace=True)
    assert out.trace_limit[1] == pytest.approx(3.686, abs=0.001)
    assert out.trace_code.tolist() == [0, 0, 0, 1]


def test_s_chart_limits_use_c4() -> None:
    """S chart with known sigma: UCL = B6 sigma, LCL = B5 sigma; for n = 10, B5 = 0.276, B6 = 1.669
    (Montgomery, Introduction to SQC, Appendix VI)."""
    params, state = SpreadParams(1), SpreadState(1)
    n = np.full(3, 10, np.int32)
    sd = np.array([1.0, 1.70, 0.25])
    tag, restart = _one_tag(3)
    out = run_spread(tag, np.zeros(3), sd, n, np.ones(1), restart, params, state, trace=True)
    assert out.trace_code.tolist() == [0, 2, 2]
    assert out.trace_direction.tolist() == [0, 1, -1]
    assert out.trace_limit[1] == pytest.approx(1.669, abs=0.001)
    assert out.trace_limit[2] == pytest.approx(0.276, abs=0.001)
