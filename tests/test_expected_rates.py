"""Designed in-control alarm intervals in time, and tune's caution on autocorrelated tags."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from streamguard.config import parse_config
from streamguard.expected_rates import designed_intervals, spread_arl
from streamguard.limits import LimitsFile, TagLimits


def _limits(period_s: float) -> LimitsFile:
    return LimitsFile(tags={"TT-1": TagLimits(mean=0.0, sigma=1.0, sample_period_s=period_s)})


def test_three_sigma_individuals_at_1_hz_alarm_every_six_minutes() -> None:
    """ARL 370.4 points (normal theory) at one point per second is a false alarm every ~6.2 minutes."""
    config = parse_config({"detectors": {"shewhart": {"rules": ["we1"]}}})
    (row,) = designed_intervals(config, _limits(1.0))
    assert row["arl"] == pytest.approx(1 / (2 * stats.norm.sf(3)), rel=1e-3)
    assert row["interval_s"] == pytest.approx(370.4, rel=1e-3)


def test_subgroup_window_sets_the_point_period() -> None:
    """With one-minute windows a point takes 60 s whatever the sample period."""
    config = parse_config({"detectors": {"cusum": {"k": 0.5, "h": 5.0}}, "subgroup": {"window": "60s"}})
    (row,) = designed_intervals(config, _limits(1.0))
    # CUSUM k = 0.5, h = 5: ARL 465 (Montgomery's CUSUM ARL table; Lucas & Crosier 1982).
    assert row["arl"] == pytest.approx(465, rel=0.005)
    assert row["interval_s"] == pytest.approx(465 * 60, rel=0.005)


def test_spread_arl_matches_simulation() -> None:
    """S-chart ARL from the chi-square law agrees with a seeded simulation of s for n = 5 (3-sigma limits):
    the exceedance probability is within 4 binomial standard errors."""
    rng = np.random.default_rng(99)
    n, draws = 5, 2_000_000
    s = rng.standard_normal((draws, n)).std(axis=1, ddof=1)
    c4 = math.sqrt(2 / (n - 1)) * math.exp(math.lgamma(n / 2) - math.lgamma((n - 1) / 2))
    p_sim = float(np.mean(s > c4 + 3 * math.sqrt(1 - c4 * c4)))
    p = 1 / spread_arl(3.0, n)
    assert abs(p_sim - p) < 4 * math.sqrt(p * (1 - p) / draws)


def test_tune_flags_autocorrelated_tags_with_remedies(capsys: pytest.CaptureFixture[str]) -> None:
    """tune with a lag-1 autocorrelation above 0.5 says the plan will alarm more than budgeted and names a
    subgroup length and model: ar1 (threshold 0.5 is common practice)."""
    from streamguard.cli import main

    assert main(["tune", "--false-alarms", "1/30d", "--period", "10s", "--shift", "1", "--autocorrelation", "0.8"]) == 0
    out = capsys.readouterr().out
    assert "caution: lag-1 autocorrelation 0.80" in out and "model: ar1" in out and "subgroups of about" in out
    assert main(["tune", "--false-alarms", "1/30d", "--period", "10s", "--shift", "1", "--autocorrelation", "0.2"]) == 0
    assert "caution" not in capsys.readouterr().out
