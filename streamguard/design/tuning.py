"""Detector settings from a false-alarm budget in time, a sample period and the shift that matters.

An operator thinks in "at most one false alarm a month per tag", a chart in points. With one chart
point every ``point period`` (the sample period times the subgroup size, or the subgroup window),
the budget "N/T" asks for an in-control ARL of T / (N * point period) points; "1/30d" at 1 s is
2 592 000 points. A target shift of delta individual sigmas is delta * sqrt(n) on the chart.

- CUSUM: k = chart shift / 2, the reference value that is optimal for that shift (Moustakides 1986);
  h solved so that the two-sided ARL equals the requirement.
- EWMA (asymptotic limits): for each lambda in [0.02, 0.5], L solved for the requirement; lambda
  chosen to minimise the ARL at the target shift (bounded scalar search on log lambda).
- Shewhart: the limit multiple from the normal tail (rule 1), or solved on the run-rule chain.

Each option reports its detection delay (zero-state ARL at the target shift, in points and times the
point period) and whether it meets ``within``; values are rounded for the config and the reported
ARLs are recomputed from the rounded values.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import yaml
from scipy import optimize
from scipy.stats import norm

from ..durations import format_duration, parse_duration
from ..errors import UsageError
from .cusum_arl import cusum_arl, quick_cusum_arl, siegmund_arl
from .ewma_arl import ewma_arl, quick_asymptotic_arl
from .shewhart_arl import ORDER_RULES, RULE_NAMES, canonical_rules, shewhart_arl

_BUDGET = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*/\s*(\S+)\s*$")
LAMBDA_RANGE = (0.02, 0.5)
# Tighter than the 0.1 % promise so that solving and rounding together stay inside it.
_SOLVE_TOLERANCE = 2e-4
# Search ceilings: beyond them a chart would need tens of thousands of states (and would be useless).
_MAX_H = 400.0
_MAX_L = 40.0


@dataclass(frozen=True)
class FalseAlarmBudget:
    """At most ``alarms`` false alarms per ``per_ns`` nanoseconds, per tag."""

    alarms: float
    per_ns: int
    text: str

    def required_arl(self, point_period_ns: float) -> float:
        return self.per_ns / (self.alarms * point_period_ns)


def parse_budget(text: str) -> FalseAlarmBudget:
    """'1/30d' -> one false alarm per 30 days."""
    match = _BUDGET.match(str(text))
    if not match:
        raise UsageError(f"--false-alarms {text!r}: write alarms/duration, e.g. '1/30d' (one per 30 days)")
    alarms = float(match.group(1))
    if alarms <= 0:
        raise UsageError(f"--false-alarms {text!r}: the number of alarms must be > 0")
    return FalseAlarmBudget(alarms, _duration("--false-alarms", match.group(2)), text.strip())


def _duration(option: str, text: str) -> int:
    try:
        return parse_duration(text)
    except ValueError as error:
        raise UsageError(f"{option}: {error}") from None


@dataclass(frozen=True)
class TuningOption:
    """One detector's solved setting and what it buys."""

    detector: str
    params: dict[str, Any]
    feasible: bool
    in_control_arl: float | None = None
    detection_arl: float | None = None
    detection_delay_s: float | None = None
    meets_within: bool | None = None
    method: str = ""
    note: str = ""

    def to_dict(self) -> dict[str, Any]:
        return {
            "detector": self.detector,
            "params": self.params,
            "feasible": self.feasible,
            "in_control_arl": self.in_control_arl,
            "detection_arl": self.detection_arl,
            "detection_delay_s": self.detection_delay_s,
            "meets_within": self.meets_within,
            "method": self.method,
            "note": self.note,
        }


@dataclass(frozen=True)
class TuningPlan:
    budget: str
    period_s: float
    subgroup_size: int
    subgroup_window: str | None
    point_period_s: float
    required_arl: float
    shift: float
    chart_shift: float
    within_s: float | None
    options: list[TuningOption] = field(default_factory=list)

    def yaml_snippet(self, option: TuningOption) -> str:
        """Ready-to-paste config lines (the config's schema) for one option."""
        document: dict[str, Any] = {}
        if self.subgroup_window is not None:
            document["subgroup"] = {"window": self.subgroup_window}
        elif self.subgroup_size > 1:
            document["subgroup"] = {"size": self.subgroup_size}
        document["detectors"] = {option.detector: option.params}
        return yaml.safe_dump(document, sort_keys=False, default_flow_style=False)

    def to_dict(self) -> dict[str, Any]:
        return {
            "false_alarms": self.budget,
            "period_s": self.period_s,
            "subgroup_size": self.subgroup_size,
            "subgroup_window": self.subgroup_window,
            "point_period_s": self.point_period_s,
            "required_in_control_arl": self.required_arl,
            "shift": self.shift,
            "chart_shift": self.chart_shift,
            "within_s": self.within_s,
            "options": [option.to_dict() | {"yaml": self.yaml_snippet(option)} for option in self.options],
        }


def _solve_increasing(function: Callable[[float], float], target: float, guess: float, ceiling: float,
                      floor: float = 1e-3) -> float | None:  # fmt: skip
    """x with f(x) = target for an increasing f; None when even f(ceiling) falls short.

    log f is smooth and nearly straight in x, so a secant step from a good guess converges in a few
    evaluations; a bracketing search (Brent) takes over if the secant misbehaves.
    """
    goal = math.log(target)

    def gap(x: float) -> float:
        return math.log(function(x)) - goal

    x0, x1 = guess, guess * 1.02
    g0, g1 = gap(x0), gap(x1)
    for _ in range(30):
        if g1 == g0:
            break
        x2 = x1 - g1 * (x1 - x0) / (g1 - g0)
        if not floor <= x2 <= ceiling:
            break
        x0, g0, x1 = x1, g1, x2
        g1 = gap(x1)
        if abs(x1 - x0) <= 1e-8 * x1 or g1 == 0.0:
            return x1
    low, high = floor, max(guess, floor * 2)
    while gap(high) < 0:
        if high >= ceiling:
            return None
        low, high = high, min(2.0 * high, ceiling)
    if gap(low) > 0:
        return low
    return float(optimize.brentq(gap, low, high, xtol=1e-9, rtol=1e-10))


def _polish(quick: Callable[[float], float], precise: Callable[[float], float], target: float,
            x: float) -> float:  # fmt: skip
    """Newton steps on the converged ARL, with the slope of the cheap one: usually two evaluations."""
    goal = math.log(target)
    step = 1e-3 * x
    slope = (math.log(quick(x + step)) - math.log(quick(x))) / step
    if not (math.isfinite(slope) and slope > 0):
        return x
    for _ in range(4):
        gap = math.log(precise(x)) - goal
        if abs(gap) <= 2e-5 or not math.isfinite(gap):
            break
        x -= gap / slope
    return x


def solve_cusum_h(k: float, target_arl: float) -> float:
    """h for which the two-sided zero-state ARL of the CUSUM equals ``target_arl``.

    Siegmund's approximation gives the first guess (within a few percent), the two-grid chain the
    root, and the converged chain the last correction.
    """
    low, high = 1e-3, 1.0
    while siegmund_arl(k, high, 0.0) < target_arl and high < _MAX_H:
        high *= 2.0
    if siegmund_arl(k, low, 0.0) >= target_arl:
        approximate = low
    else:
        approximate = optimize.brentq(lambda h: math.log(siegmund_arl(k, h, 0.0) / target_arl), low, high)

    def quick(h: float) -> float:
        return quick_cusum_arl(k, h, 0.0)

    h = _solve_increasing(quick, target_arl, min(approximate, _MAX_H), _MAX_H)
    if h is None:
        raise UsageError(f"no CUSUM decision interval up to h = {_MAX_H:g} reaches an in-control ARL of "
                         f"{target_arl:.4g} with k = {k:g}: the target shift is small for this budget")  # fmt: skip
    return _polish(quick, lambda h: cusum_arl(k, h, 0.0, 0.0, "two", _SOLVE_TOLERANCE)[0].value, target_arl, h)


def solve_ewma_limit(lam: float, target_arl: float, limits: str = "asymptotic", guess: float | None = None,
                 quick: bool = False) -> float:  # fmt: skip
    """L for the required in-control ARL; ``quick`` stops at the two-grid ARL meant for searches."""

    def cheap(L: float) -> float:
        return quick_asymptotic_arl(lam, L, 0.0)

    start = guess if guess is not None else float(norm.isf(1.0 / (2.0 * target_arl)))
    L = _solve_increasing(cheap, target_arl, start, _MAX_L)
    if L is None:
        raise UsageError(f"no EWMA limit up to L = {_MAX_L:g} reaches an in-control ARL of {target_arl:.4g}")
    if quick and limits == "asymptotic":
        return L
    return _polish(cheap, lambda L: ewma_arl(lam, L, limits, 0.0, _SOLVE_TOLERANCE)[0].value, target_arl, L)


def solve_ewma(target_arl: float, chart_shift: float) -> tuple[float, float]:
    """(lambda, L) with the required in-control ARL and the smallest ARL at ``chart_shift``."""
    solved: dict[float, tuple[float, float]] = {}  # lambda -> (L, ARL at the shift)
    last_L: list[float] = []

    def detection(log_lambda: float) -> float:
        lam = math.exp(log_lambda)
        if lam not in solved:
            L = solve_ewma_limit(lam, target_arl, guess=last_L[-1] if last_L else None, quick=True)
            last_L.append(L)
            solved[lam] = (L, quick_asymptotic_arl(lam, L, chart_shift))
        return solved[lam][1]

    low, high = (math.log(x) for x in LAMBDA_RANGE)
    best = optimize.minimize_scalar(detection, bounds=(low, high), method="bounded", options={"xatol": 0.02})
    lam = math.exp(float(best.x))
    # The bounded search stops short of the bounds; take a bound when it is at least as good.
    for edge in LAMBDA_RANGE:
        if detection(math.log(edge)) <= detection(math.log(lam)):
            lam = edge
    return lam, solved[lam][0]


def solve_shewhart_limit(target_arl: float, rules: Sequence[str], run_length: int) -> float | None:
    """Limit multiple for the required ARL; None when the run rules alone alarm more often than allowed."""
    if canonical_rules(rules) == {"we1"}:
        return float(norm.isf(1.0 / (2.0 * target_arl)))
    guess = float(norm.isf(1.0 / (2.0 * target_arl)))
    return _solve_increasing(lambda limit: shewhart_arl(limit, rules, run_length, 0.0)[0], target_arl, guess, 12.0)


def _delay(arl_points: float, point_period_s: float, within_s: float | None) -> tuple[float, bool | None]:
    delay = arl_points * point_period_s
    return delay, (None if within_s is None else delay <= within_s)


def tune(false_alarms: str, period: str, shift: float, subgroup_size: int | None = None,
         subgroup_window: str | None = None, within: str | None = None,
         rules: Sequence[str] = ("we1",), run_length: int = 8) -> TuningPlan:  # fmt: skip
    """Solve CUSUM, EWMA and Shewhart settings for a false-alarm budget; see the module docstring."""
    budget = parse_budget(false_alarms)
    period_ns = _duration("--period", period)
    if subgroup_size is not None and subgroup_window is not None:
        raise UsageError("give either --subgroup-size or --subgroup-window, not both")
    if subgroup_window is not None:
        window_ns = _duration("--subgroup-window", subgroup_window)
        size = window_ns // period_ns
        if size < 1:
            raise UsageError(f"--subgroup-window {subgroup_window} is shorter than the sample period {period}")
        point_period_ns = float(window_ns)
    else:
        size = 1 if subgroup_size is None else subgroup_size
        if isinstance(size, bool) or not isinstance(size, int) or size < 1:
            raise UsageError(f"--subgroup-size: a whole number >= 1, got {subgroup_size!r}")
        point_period_ns = float(size * period_ns)
    if not (math.isfinite(shift) and shift > 0):
        raise UsageError(f"--shift: the shift to detect, in sigma of individual values, must be > 0, got {shift}")
    bad = [rule for rule in rules if rule not in RULE_NAMES]
    if bad or not rules:
        raise UsageError(f"--rules: unknown or missing rule(s) {', '.join(bad)}; known: {', '.join(RULE_NAMES)}")
    if not (isinstance(run_length, int) and 2 <= run_length <= 15):
        raise UsageError(f"--run-length: an integer from 2 to 15, got {run_length!r}")
    within_s = None if within is None else _duration("--within", within) / 1e9
    required = budget.required_arl(point_period_ns)
    if required < 2.0:
        raise UsageError(
            f"--false-alarms {false_alarms}: that allows a false alarm every {required:.2g} chart points; "
            "no chart is that loose — check the budget and the period"
        )
    mean = shift * math.sqrt(size)
    point_period_s = point_period_ns / 1e9
    plan = TuningPlan(budget.text, period_ns / 1e9, size, subgroup_window, point_period_s, required, shift, mean,
                      within_s)  # fmt: skip
    plan.options.extend([
        _cusum_option(required, mean, point_period_s, within_s),
        _ewma_option(required, mean, point_period_s, within_s),
        _shewhart_option(required, mean, point_period_s, within_s, tuple(rules), run_length),
    ])  # fmt: skip
    return plan


def _cusum_option(required: float, mean: float, point_period_s: float, within_s: float | None) -> TuningOption:
    k = round(mean / 2.0, 4)
    try:
        h = round(solve_cusum_h(k, required), 4)
    except UsageError as error:
        return TuningOption("cusum", {"k": k, "h": None, "headstart": 0.0}, False, note=str(error))
    in_control = cusum_arl(k, h, 0.0, 0.0)[0].value
    detection, method = cusum_arl(k, h, 0.0, mean)
    delay, meets = _delay(detection.value, point_period_s, within_s)
    return TuningOption("cusum", {"k": k, "h": h, "headstart": 0.0}, True, in_control, detection.value, delay,
                        meets, method, "k = half the target shift on the chart; h solved for the budget")  # fmt: skip


def _ewma_option(required: float, mean: float, point_period_s: float, within_s: float | None) -> TuningOption:
    try:
        lam, L = solve_ewma(required, mean)
        lam = round(lam, 3)
        L = round(solve_ewma_limit(lam, required, guess=L), 4)
    except UsageError as error:
        return TuningOption("ewma", {"lambda": None, "L": None, "limits": "asymptotic"}, False, note=str(error))
    in_control = ewma_arl(lam, L, "asymptotic", 0.0)[0].value
    detection, method = ewma_arl(lam, L, "asymptotic", mean)
    delay, meets = _delay(detection.value, point_period_s, within_s)
    note = f"lambda searched over [{LAMBDA_RANGE[0]}, {LAMBDA_RANGE[1]}] for the fastest detection"
    if lam in LAMBDA_RANGE:
        note += f"; the best lambda is at the edge of that range ({lam:g})"
    return TuningOption("ewma", {"lambda": lam, "L": L, "limits": "asymptotic"}, True, in_control,
                        detection.value, delay, meets, method, note)  # fmt: skip


def _shewhart_option(required: float, mean: float, point_period_s: float, within_s: float | None,
                     rules: tuple[str, ...], run_length: int) -> TuningOption:  # fmt: skip
    params: dict[str, Any] = {"limit": None, "rules": list(rules), "run_length": run_length}
    if canonical_rules(rules) & ORDER_RULES:
        return TuningOption("shewhart", params, False,
                            note="nelson3/nelson4 are evaluated by simulation and cannot be tuned here; "
                                 "use `streamguard arl shewhart` to check a chosen limit")  # fmt: skip
    limit = solve_shewhart_limit(required, rules, run_length)
    if limit is None:
        ceiling = shewhart_arl(12.0, rules, run_length, 0.0)[0]
        return TuningOption("shewhart", params, False, in_control_arl=ceiling,
                            note=f"rules {', '.join(rules)} alone give an in-control ARL of {ceiling:.4g} < "
                                 f"{required:.4g} at any limit: drop run rules or loosen the budget")  # fmt: skip
    params["limit"] = round(limit, 4)
    in_control, _, _ = shewhart_arl(params["limit"], rules, run_length, 0.0)
    detection, _, method = shewhart_arl(params["limit"], rules, run_length, mean)
    delay, meets = _delay(detection, point_period_s, within_s)
    return TuningOption("shewhart", params, True, in_control, detection, delay, meets, method,
                        "limit multiple solved for the budget")  # fmt: skip


def describe_delay(seconds: float) -> str:
    return format_duration(seconds * 1e9)
