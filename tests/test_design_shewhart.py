"""Shewhart run lengths with run rules, against normal theory, Champ & Woodall (1987) and simulation.

Simulation checks allow 4 standard errors of the simulated mean (a false failure about once in 16,000).
"""

from __future__ import annotations

from collections.abc import Callable, Hashable

import numpy as np
import pytest
import scipy.sparse as sparse
import scipy.sparse.linalg as sparse_linalg
from scipy.stats import norm

from streamguard.design import arl, run_length
from streamguard.design.shewhart_arl import shewhart_chain
from streamguard.design.simulation import shewhart_runs, simulate_shewhart

SIMULATION_SE = 4.0


def test_three_sigma_rule_one_is_370_4() -> None:
    """Rule 1 at 3 sigma: ARL = 1 / (2 * P(Z > 3)) = 370.4 (normal theory, scipy)."""
    expected = 1.0 / (2.0 * norm.sf(3.0))
    assert arl("shewhart", {"limit": 3.0, "rules": ["we1"]}) == pytest.approx(expected, rel=1e-12)
    assert round(expected, 1) == 370.4
    # The chain reproduces the closed form when asked to (one state, geometric run length).
    assert shewhart_chain(3.0, ["we1"], 8, 0.0).arl() == pytest.approx(expected, rel=1e-12)


def test_rule_one_at_a_shift_is_geometric() -> None:
    """At shift d the signal probability is P(Z > 3 - d) + P(Z < -3 - d) (normal theory, scipy)."""
    p = norm.sf(3.0 - 1.0) + norm.cdf(-3.0 - 1.0)
    assert arl("shewhart", {"limit": 3.0}, 1.0) == pytest.approx(1.0 / p, rel=1e-12)
    result = run_length("shewhart", {"limit": 3.0}, 1.0)
    assert result.sdrl == pytest.approx(np.sqrt(1.0 - p) / p, rel=1e-9)  # geometric SD
    assert result.quantiles[0.5] == int(np.ceil(np.log(0.5) / np.log(1.0 - p)))  # geometric median


@pytest.mark.parametrize(
    ("rules", "printed"),
    [
        (["we1", "we2", "we3", "we4"], 91.75),  # Champ & Woodall (1987), Technometrics 29, Table 2
        (["we1", "we2"], 225.44),  # same table (from memory)
        (["we1", "we3"], 166.05),  # same table (from memory)
        (["we1", "we4"], 152.73),  # same table (from memory)
    ],
)
def test_western_electric_rules_match_champ_and_woodall(rules: list[str], printed: float) -> None:
    """In-control ARLs of 3-sigma charts with supplementary runs rules, to the printed 0.01."""
    assert arl("shewhart", {"limit": 3.0, "rules": rules}) == pytest.approx(printed, abs=0.005 + 1e-9)


def test_aliases_give_identical_charts() -> None:
    """nelson1/5/6 are we1/2/3 under other names; the chain must not tell them apart."""
    western = arl("shewhart", {"rules": ["we1", "we2", "we3"]}, 0.5)
    nelson = arl("shewhart", {"rules": ["nelson1", "nelson5", "nelson6"]}, 0.5)
    assert western == nelson


@pytest.mark.parametrize(
    ("rules", "shift"),
    [
        (("we1", "we2", "we3", "we4"), 0.5),
        (("we1", "nelson2", "nelson7", "nelson8"), 0.0),
        (("we2", "we4", "nelson8"), 1.0),
    ],
)
def test_chain_matches_simulation(rules: tuple[str, ...], shift: float) -> None:
    """The rule-history chain against 20,000 seeded simulated runs (4 standard errors)."""
    exact = arl("shewhart", {"limit": 3.0, "rules": list(rules), "run_length": 7}, shift)
    simulated = shewhart_runs(3.0, rules, 7, shift, runs=20_000, max_points=10**8, seed=31)
    assert abs(exact - simulated.arl) <= SIMULATION_SE * simulated.standard_error


def _rank_chain_arl(update: Callable[[Hashable, int], Hashable | None], cells: int) -> float:
    """In-control ARL of a rule on the up/down pattern of i.i.d. continuous points.

    In control the pattern of rises and falls does not depend on the distribution, so the current point
    is represented by its probability-integral transform u ~ U(0, 1), cut into ``cells`` cells. The next
    point rises when its cell is higher, falls when lower, and either with probability 1/2 in the same
    cell; ``update(key, direction)`` returns the new rule key or None for a signal. Error ~ 1/cells^2.
    """
    keys: dict[Hashable, int] = {}
    pending: list[Hashable] = []

    def index(key: Hashable) -> int:
        if key not in keys:
            keys[key] = len(keys)
            pending.append(key)
        return keys[key]

    start = "first point"
    index(start)
    rows, cols, vals = [], [], []
    cell = np.arange(cells)
    while pending:
        key = pending.pop()
        for i in range(cells):
            for direction, targets, weight in ((1, cell[cell > i], 1.0), (-1, cell[cell < i], 1.0),
                                               (1, np.array([i]), 0.5), (-1, np.array([i]), 0.5)):  # fmt: skip
                following = update(key, direction)
                if following is None or targets.size == 0:
                    continue
                rows.append(np.full(targets.size, keys[key] * cells + i))
                cols.append(index(following) * cells + targets)
                vals.append(np.full(targets.size, weight / cells))
    size = len(keys) * cells
    transient = sparse.csr_matrix(
        (np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(size, size)
    )
    remaining = sparse_linalg.spsolve((sparse.identity(size) - transient).tocsc(), np.ones(size))
    # Point one lands uniformly in a cell of the start key.
    return float(1.0 + remaining[keys[start] * cells : (keys[start] + 1) * cells].mean())


def _trend(key: Hashable, direction: int) -> Hashable | None:
    run = 0 if key == "first point" else int(key)  # type: ignore[call-overload]
    run = run + direction if run * direction > 0 else direction
    return None if abs(run) >= 5 else run


def _alternating(key: Hashable, direction: int) -> Hashable | None:
    previous: tuple[int, int] = (0, 0) if key == "first point" else key  # type: ignore[assignment]
    count = previous[0] + 1 if direction == -previous[1] else 1
    return None if count >= 13 else (count, direction)


@pytest.mark.parametrize(("rule", "update"), [("nelson3", _trend), ("nelson4", _alternating)])
def test_order_rules_simulation_matches_an_independent_rank_chain(rule: str, update: Callable) -> None:
    """nelson3 (6 points rising or falling) and nelson4 (14 alternating) in control, simulated vs exact.

    The reference is the rank chain above, extrapolated from 60 and 120 cells (Richardson); the ARL
    simulated from 10,000 seeded runs must lie within 4 standard errors of it.
    """
    coarse, fine = _rank_chain_arl(update, 60), _rank_chain_arl(update, 120)
    reference = fine + (fine - coarse) / 3.0
    result = simulate_shewhart(30.0, (rule,), 8, 0.0, 0.0, runs=10_000)
    assert result.standard_error is not None
    assert "simulation" in result.method
    assert abs(result.arl - reference) <= SIMULATION_SE * result.standard_error


def test_subgroups_scale_the_shift_by_root_n() -> None:
    """A shift delta with subgroups of n is delta*sqrt(n) for single points."""
    params = {"rules": ["we1", "we2", "we3", "we4"]}
    assert arl("shewhart", params, 0.5, subgroup_size=9) == pytest.approx(arl("shewhart", params, 1.5))


def test_steady_state_of_rule_one_equals_zero_state() -> None:
    """Rule 1 alone has no memory, so the conditional steady-state ARL is the zero-state ARL."""
    result = run_length("shewhart", {"limit": 3.0}, 1.0)
    assert result.steady_state_arl == pytest.approx(result.arl, rel=1e-9)


def test_order_rules_go_through_simulation_with_a_standard_error() -> None:
    """The public entry point routes nelson3 to the seeded simulation and reports its precision."""
    result = run_length("shewhart", {"rules": ["we1", "nelson3"]}, shift=2.0)
    assert "simulation" in result.method and result.standard_error is not None
    assert result.tolerance == pytest.approx(2 * result.standard_error / result.arl)
    # On the same points, a chart with an extra rule signals no later, so its ARL cannot be longer.
    assert result.arl <= arl("shewhart", {"rules": ["we1"]}, shift=2.0) + 4 * result.standard_error
