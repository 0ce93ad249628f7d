"""Run lengths of the Shewhart chart with run rules, with the semantics of ``detectors/shewhart.py``.

Every rule except the two that compare successive values (nelson3, nelson4) looks only at which zone
each recent point fell in, so the chart is a finite Markov chain on the recent history (Champ &
Woodall, Technometrics 29, 1987). The state keeps exactly what the selected rules need:

- the last two points' "beyond 2" side (we2 / nelson5: 2 of the last 3 beyond 2 on one side);
- the last four points' "beyond 1" side (we3 / nelson6: 4 of the last 5 beyond 1 on one side);
- the current same-side run (we4: run_length points, nelson2: 9 points on one side of 0);
- the runs of points inside (nelson7: 15 with |z| < 1) and outside (nelson8: 8 with |z| > 1) one sigma.

States are enumerated from the empty history by breadth-first search, so only reachable ones exist;
the chain is exact (no discretisation), solved with a sparse LU. nelson3 and nelson4 depend on the
order of continuous values and are evaluated by seeded simulation through the pipeline's own kernel
(``simulation.py``), with the standard error reported.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import scipy.sparse as sparse
from scipy.special import ndtr

from .markov import AbsorbingChain, read_quantiles
from .results import DEFAULT_QUANTILES, RunLength

RULE_NAMES = (
    "we1", "we2", "we3", "we4",
    "nelson1", "nelson2", "nelson3", "nelson4", "nelson5", "nelson6", "nelson7", "nelson8",
)  # fmt: skip
# Rules that are the same test under two names.
_SAME_AS = {"nelson1": "we1", "nelson5": "we2", "nelson6": "we3"}
ORDER_RULES = frozenset({"nelson3", "nelson4"})

# A state: (last two beyond-2 sides, last four beyond-1 sides, signed same-side run, inner run, outer run)
State = tuple[tuple[int, ...], tuple[int, ...], int, int, int]


@dataclass(frozen=True)
class _Zone:
    beyond_limit: bool
    side: int
    beyond_two: int
    beyond_one: int
    inner: bool
    outer: bool


@dataclass(frozen=True)
class _Structure:
    """Zone edges and the transitions (source, zone, destination; -1 = signal) of a rule set."""

    edges: np.ndarray  # finite zone boundaries, ascending
    source: np.ndarray
    zone: np.ndarray
    destination: np.ndarray
    states: int


def canonical_rules(rules: Iterable[str]) -> frozenset[str]:
    return frozenset(_SAME_AS.get(rule, rule) for rule in rules)


def _zones(limit: float) -> tuple[np.ndarray, list[_Zone]]:
    edges = np.array(sorted({-limit, -2.0, -1.0, 0.0, 1.0, 2.0, limit}))
    bounds = np.concatenate([[-np.inf], edges, [np.inf]])
    zones = []
    for low, high in zip(bounds[:-1], bounds[1:], strict=True):
        x = high - 1.0 if np.isinf(low) else (low + 1.0 if np.isinf(high) else 0.5 * (low + high))
        zones.append(
            _Zone(
                beyond_limit=abs(x) > limit,
                side=1 if x > 0 else -1,
                beyond_two=1 if x > 2.0 else (-1 if x < -2.0 else 0),
                beyond_one=1 if x > 1.0 else (-1 if x < -1.0 else 0),
                inner=abs(x) < 1.0,
                outer=abs(x) > 1.0,
            )
        )
    return edges, zones


def _step(state: State, zone: _Zone, rules: frozenset[str], side_run_needed: int) -> State | None:
    """The next state after a point in ``zone``, or None when a selected rule signals."""
    two, one, side_run, inner_run, outer_run = state
    if "we1" in rules and zone.beyond_limit:
        return None
    if "we2" in rules:
        window = (*two, zone.beyond_two)
        if window.count(1) >= 2 or window.count(-1) >= 2:
            return None
        two = window[1:]
    if "we3" in rules:
        window = (*one, zone.beyond_one)
        if window.count(1) >= 4 or window.count(-1) >= 4:
            return None
        one = window[1:]
    if side_run_needed:
        same = side_run * zone.side > 0
        side_run = side_run + zone.side if same else zone.side
        if abs(side_run) >= side_run_needed:
            return None
    if "nelson7" in rules:
        inner_run = inner_run + 1 if zone.inner else 0
        if inner_run >= 15:
            return None
    if "nelson8" in rules:
        outer_run = outer_run + 1 if zone.outer else 0
        if outer_run >= 8:
            return None
    return (two, one, side_run, inner_run, outer_run)


@lru_cache(maxsize=64)
def _structure(rules: frozenset[str], limit: float, run_length: int) -> _Structure:
    edges, zones = _zones(limit)
    needed = [run_length] if "we4" in rules else []
    needed += [9] if "nelson2" in rules else []
    side_run_needed = min(needed) if needed else 0
    start: State = ((0, 0), (0, 0, 0, 0), 0, 0, 0)
    index = {start: 0}
    queue = [start]
    source, zone_of, destination = [], [], []
    while queue:
        state = queue.pop()
        for z, zone in enumerate(zones):
            following = _step(state, zone, rules, side_run_needed)
            if following is None:
                target = -1
            else:
                if following not in index:
                    index[following] = len(index)
                    queue.append(following)
                target = index[following]
            source.append(index[state])
            zone_of.append(z)
            destination.append(target)
    return _Structure(edges, np.array(source), np.array(zone_of), np.array(destination), len(index))


def zone_probabilities(edges: np.ndarray, mean: float) -> np.ndarray:
    # Upper tails via ndtr(-x) keep the small probabilities of the outer zones accurate.
    bounds = np.concatenate([[-np.inf], edges, [np.inf]])
    below = ndtr(bounds - mean)
    above = ndtr(mean - bounds)
    return np.where(bounds[1:] <= mean, np.diff(below), -np.diff(above))


def shewhart_chain(limit: float, rules: Iterable[str], run_length: int, mean: float) -> AbsorbingChain:
    canonical = canonical_rules(rules)
    if canonical & ORDER_RULES:
        raise ValueError("nelson3 and nelson4 have no finite Markov chain; use simulation")
    structure = _structure(canonical, float(limit), int(run_length))
    probability = zone_probabilities(structure.edges, mean)[structure.zone]
    keep = structure.destination >= 0
    transient = sparse.csr_matrix(
        (probability[keep], (structure.source[keep], structure.destination[keep])),
        shape=(structure.states, structure.states),
    )
    # State 0 is the empty history; its row is the distribution after the first point.
    first_step = np.asarray(transient[0].todense()).ravel()
    return AbsorbingChain(transient, first_step)


def rule_one_arl(limit: float, mean: float) -> float:
    """Rule 1 alone: a geometric run length with p = P(|z| > limit)."""
    return float(1.0 / (ndtr(-limit - mean) + ndtr(mean - limit)))


def shewhart_run_length(limit: float, rules: Iterable[str], run_length: int, shift: float,
                        chart_shift: float, quantiles: tuple[float, ...] = DEFAULT_QUANTILES,
                        steady_state: bool = True, seed: int | None = None) -> RunLength:  # fmt: skip
    rules = tuple(rules)
    canonical = canonical_rules(rules)
    if canonical & ORDER_RULES:
        from .simulation import simulate_shewhart

        return simulate_shewhart(limit, rules, run_length, shift, chart_shift, quantiles, seed=seed)
    chain = shewhart_chain(limit, canonical, run_length, chart_shift)
    survival = chain.survival(1.0 - max(quantiles)) if quantiles else None
    steady = None
    if steady_state:
        in_control = chain if chart_shift == 0.0 else shewhart_chain(limit, canonical, run_length, 0.0)
        steady = chain.steady_state_arl(in_control)
    structure = _structure(canonical, float(limit), int(run_length))
    return RunLength(
        detector="shewhart",
        shift=shift,
        chart_shift=chart_shift,
        arl=chain.arl(),
        tolerance=1e-9,
        method=f"exact Markov chain on the rule history (Champ & Woodall 1987), {structure.states} states",
        sdrl=chain.sdrl(),
        quantiles=read_quantiles(survival, quantiles) if survival is not None else {},
        steady_state_arl=steady,
    )


def shewhart_arl(limit: float, rules: Iterable[str], run_length: int, chart_shift: float,
                 seed: int | None = None) -> tuple[float, float, str]:  # fmt: skip
    """ARL, its relative tolerance and the method; the cheapest exact route for the rule set."""
    canonical = canonical_rules(rules)
    if canonical == {"we1"}:
        return rule_one_arl(limit, chart_shift), 1e-12, "normal theory, rule 1 alone (geometric run length)"
    if canonical & ORDER_RULES:
        result = shewhart_run_length(limit, tuple(rules), run_length, math.nan, chart_shift, (), False, seed)
        return result.arl, result.tolerance, result.method
    chain = shewhart_chain(limit, canonical, run_length, chart_shift)
    return chain.arl(), 1e-9, "exact Markov chain on the rule history (Champ & Woodall 1987)"
