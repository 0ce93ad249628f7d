"""Tuning detector settings to a false-alarm budget: arithmetic, round trips, optimality, config schema."""

from __future__ import annotations

import math

import pytest
import yaml
from scipy.stats import norm

from streamguard.config import Detectors, Subgroup
from streamguard.design import arl, parse_budget, tune
from streamguard.design.tuning import solve_cusum_h, solve_ewma_limit, solve_shewhart_limit
from streamguard.errors import UsageError


def test_budget_arithmetic() -> None:
    """'1/30d' at 1 s is 30 * 86,400 = 2,592,000 points; '2/7d' at one point a minute is 5,040 points."""
    assert parse_budget("1/30d").required_arl(1e9) == 2_592_000
    assert parse_budget("2/7d").required_arl(60e9) == pytest.approx(7 * 86_400 / (2 * 60))
    plan = tune("1/30d", "1s", shift=1.0, subgroup_size=5)
    assert plan.point_period_s == 5.0
    assert plan.required_arl == pytest.approx(2_592_000 / 5)
    assert plan.chart_shift == pytest.approx(math.sqrt(5))
    windowed = tune("1/30d", "10s", shift=1.0, subgroup_window="60s")
    assert windowed.subgroup_size == 6 and windowed.point_period_s == 60.0
    assert windowed.required_arl == pytest.approx(43_200)


@pytest.mark.parametrize(("k", "target"), [(0.5, 465.0), (0.25, 2_592_000.0), (1.0, 50_000.0)])
def test_solved_h_round_trips_within_a_tenth_of_a_percent(k: float, target: float) -> None:
    """The solved h gives the required two-sided ARL within 0.1 % when fed back to the engine."""
    h = solve_cusum_h(k, target)
    assert arl("cusum", {"k": k, "h": h}) == pytest.approx(target, rel=1e-3)


def test_solved_h_for_the_published_design_is_5() -> None:
    """k = 0.5 and ARL0 = 465 lead back to h = 5 (Montgomery's CUSUM table: h = 5 gives 465)."""
    assert solve_cusum_h(0.5, 465.45) == pytest.approx(5.0, abs=2e-3)


def test_solved_ewma_limit_recovers_the_published_value() -> None:
    """lambda = 0.1 and ARL0 = 500 give L = 2.814 to its printed 3 decimals (Lucas & Saccucci 1990)."""
    assert solve_ewma_limit(0.1, 500.0) == pytest.approx(2.814, abs=0.0005 + 1e-4)


def test_shewhart_limit_is_the_normal_quantile() -> None:
    """Rule 1 alone: limit = z_{1 - 1/(2 ARL)} (normal theory, scipy); with rules, a round trip."""
    assert solve_shewhart_limit(370.398, ["we1"], 8) == pytest.approx(3.0, abs=1e-4)
    assert solve_shewhart_limit(1e6, ["we1"], 8) == pytest.approx(norm.isf(0.5e-6), rel=1e-12)
    limit = solve_shewhart_limit(120.0, ["we1", "we4"], 8)
    assert limit is not None
    assert arl("shewhart", {"limit": limit, "rules": ["we1", "we4"]}) == pytest.approx(120.0, rel=1e-3)


def test_plan_meets_the_budget_and_reports_consistent_delays() -> None:
    """Every option's in-control ARL (from the rounded settings) is the requirement within 0.1 %."""
    plan = tune("1/30d", "1s", shift=0.5, subgroup_size=5, within="1h")
    assert [option.detector for option in plan.options] == ["cusum", "ewma", "shewhart"]
    for option in plan.options:
        assert option.feasible
        assert option.in_control_arl == pytest.approx(plan.required_arl, rel=1e-3)
        assert option.detection_arl is not None and option.detection_delay_s is not None
        assert option.detection_delay_s == pytest.approx(option.detection_arl * plan.point_period_s)
        assert option.meets_within == (option.detection_delay_s <= 3600.0)
    cusum = plan.options[0]
    assert cusum.params["k"] == pytest.approx(0.5 * math.sqrt(5) / 2, abs=5e-5)
    assert arl("cusum", cusum.params, 0.5, subgroup_size=5) == pytest.approx(cusum.detection_arl)


def test_ewma_lambda_is_a_local_optimum() -> None:
    """Moving lambda by 30 % either way (L re-solved for the same budget) does not detect faster."""
    plan = tune("1/7d", "10s", shift=1.0)
    option = plan.options[1]
    lam = option.params["lambda"]
    best = option.detection_arl
    assert best is not None
    for other in (lam / 1.3, lam * 1.3):
        if not 0.02 <= other <= 0.5:
            continue
        L = solve_ewma_limit(other, plan.required_arl)
        detection = arl("ewma", {"lambda": other, "L": L, "limits": "asymptotic"}, plan.chart_shift)
        assert detection >= best * (1 - 1e-3)


def test_run_rules_that_cannot_meet_the_budget_are_reported_not_solved() -> None:
    """Rules 1-4 false-alarm every ~92 points at any limit: a day of 10 s points (8,640) is out of reach."""
    plan = tune("1/1d", "10s", shift=1.0, rules=("we1", "we2", "we3", "we4"))
    shewhart = plan.options[2]
    assert not shewhart.feasible
    assert shewhart.in_control_arl is not None and shewhart.in_control_arl < 200


def test_yaml_snippets_validate_against_the_config_schema() -> None:
    """Each snippet parses and is accepted by the config's own models (streamguard.config)."""
    plan = tune("1/30d", "10s", shift=1.5, subgroup_window="60s")
    for option in plan.options:
        document = yaml.safe_load(plan.yaml_snippet(option))
        Subgroup.model_validate(document["subgroup"])
        detectors = Detectors.model_validate(document["detectors"])
        assert option.detector in detectors.enabled()


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"false_alarms": "1-30d"}, "alarms/duration"),
        ({"false_alarms": "0/30d"}, "> 0"),
        ({"period": "fast"}, "--period"),
        ({"shift": 0.0}, "--shift"),
        ({"subgroup_size": 5, "subgroup_window": "60s"}, "not both"),
        ({"subgroup_window": "1s", "period": "10s"}, "shorter"),
        ({"rules": ("we9",)}, "--rules"),
        ({"false_alarms": "1000/1m"}, "every"),
    ],
)
def test_bad_requests_raise_usage_errors(kwargs: dict, message: str) -> None:
    """Mistakes a user can make come back as UsageError naming the option."""
    arguments = {"false_alarms": "1/30d", "period": "1s", "shift": 1.0} | kwargs
    with pytest.raises(UsageError, match=message):
        tune(**arguments)
