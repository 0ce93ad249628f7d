"""Average run lengths measured by seeded simulation through the real pipeline, against published values.

Each tag is one independent replication; the run length is the number of points to the tag's first
raise. With R replications the standard error of the mean run length is sd(RL)/sqrt(R), and for these
nearly geometric run lengths sd(RL) is close to the ARL itself; each test uses the measured sd and
allows 4 standard errors (a false failure about once in 16,000 runs).
"""

from __future__ import annotations

import numpy as np
import pytest

from streamguard.pipeline import Pipeline

from .helpers import first_raise_points, interleaved, make_config

TOLERANCE_SE = 4.0


def simulate_run_lengths(detectors: dict, shift: float, replications: int, length: int, seed: int,
                         subgroup: dict | None = None) -> np.ndarray:  # fmt: skip
    """Run `replications` tags of `length` samples through one pipeline; return first-raise run lengths."""
    extra = {"subgroup": subgroup} if subgroup else {}
    config = make_config(detectors, **extra)
    pipeline = Pipeline(config)
    pipeline.tags.lookup([f"T{i}" for i in range(replications)])
    rng = np.random.default_rng(seed)
    events = []
    block = 500  # time steps per batch: bounded memory, and the batches exercise state carry-over
    for start in range(0, length, block):
        steps = min(block, length - start)
        values = rng.standard_normal((replications, steps)) + shift
        batch = interleaved(values, start_s=1.8e9 + start)
        events.extend(pipeline.process(batch))
    name = next(iter(detectors))
    runs = first_raise_points(pipeline, events, length, name)
    assert np.all(runs <= length), "some replications never signalled: lengthen the simulation"
    return runs


def assert_arl(runs: np.ndarray, published: float, divisor: int = 1) -> None:
    runs = runs / divisor
    se = runs.std(ddof=1) / np.sqrt(runs.size)
    assert abs(runs.mean() - published) < TOLERANCE_SE * se, (runs.mean(), published, se)


@pytest.mark.parametrize("h, shift, published, replications, length", [
    (4.0, 0.0, 168.0, 3000, 2500),   # Lucas & Crosier (1982), Table 1 / Montgomery's CUSUM ARL table
    (5.0, 0.0, 465.0, 3000, 6000),   # same sources
    (4.0, 1.0, 8.38, 4000, 120),     # same sources
    (5.0, 1.0, 10.4, 4000, 150),     # same sources
])  # fmt: skip
def test_two_sided_cusum_arl(h: float, shift: float, published: float, replications: int, length: int) -> None:
    """Two-sided tabular CUSUM, k = 0.5: published in-control and 1-sigma ARLs."""
    runs = simulate_run_lengths({"cusum": {"k": 0.5, "h": h}}, shift, replications, length, seed=int(h * 10 + shift))
    assert_arl(runs, published)


def test_cusum_headstart_arl() -> None:
    """CUSUM k = 0.5, h = 4 with headstart h/2: in-control ARL 149 (Lucas & Crosier 1982, Table 1)."""
    runs = simulate_run_lengths({"cusum": {"k": 0.5, "h": 4.0, "headstart": 0.5}}, 0.0, 3000, 2500, seed=7)
    assert_arl(runs, 149.0)


def test_shewhart_three_sigma_arl() -> None:
    """Shewhart 3-sigma rule 1 alone: ARL = 1 / (2 * (1 - Phi(3))) = 370.4 (normal theory, scipy)."""
    from scipy.stats import norm

    published = 1.0 / (2.0 * norm.sf(3.0))
    assert published == pytest.approx(370.4, abs=0.05)
    runs = simulate_run_lengths({"shewhart": {"rules": ["we1"]}}, 0.0, 3000, 5000, seed=11)
    assert_arl(runs, published)


def test_western_electric_rules_arl() -> None:
    """Western Electric rules 1-4 together: in-control ARL 91.75 (Champ & Woodall 1987)."""
    runs = simulate_run_lengths({"shewhart": {"rules": ["we1", "we2", "we3", "we4"]}}, 0.0, 4000, 1500, seed=13)
    assert_arl(runs, 91.75)


def test_ewma_in_control_arl() -> None:
    """EWMA lambda = 0.2, L = 2.962, asymptotic limits: in-control ARL 500
    (Lucas & Saccucci 1990; Montgomery's EWMA ARL table)."""
    runs = simulate_run_lengths({"ewma": {"lambda": 0.2, "L": 2.962, "limits": "asymptotic"}}, 0.0, 3000, 6000,
                                seed=17)  # fmt: skip
    assert_arl(runs, 500.0)


def test_subgroup_mean_limits_are_standard_errors() -> None:
    """Subgroups of n = 4: Shewhart 3-sigma limits on the mean use sigma/sqrt(n), so the in-control ARL
    in subgroups is still 370.4 (normal theory); limits at 3 sigma of individuals would give ~1e9."""
    runs = simulate_run_lengths({"shewhart": {"rules": ["we1"]}}, 0.0, 1500, 4 * 6000, seed=19,
                                subgroup={"size": 4})  # fmt: skip
    assert_arl(runs, 370.4, divisor=4)


@pytest.mark.parametrize("detectors, shift, replications, length", [
    ({"cusum": {"k": 0.25, "h": 6.0, "headstart": 0.5}}, 0.5, 3000, 400),
    ({"ewma": {"lambda": 0.1, "L": 2.6, "limits": "exact"}}, 0.0, 2000, 6000),
    ({"ewma": {"lambda": 0.3, "L": 2.9, "limits": "asymptotic"}}, 1.0, 3000, 200),
    ({"shewhart": {"limit": 3.0, "rules": ["we1", "we2", "nelson2"]}}, 0.0, 3000, 1500),
    ({"shewhart": {"limit": 2.8, "rules": ["we1", "we3", "we4"], "run_length": 7}}, 0.5, 3000, 600),
])  # fmt: skip
def test_engine_agrees_with_the_pipeline(detectors: dict, shift: float, replications: int, length: int) -> None:
    """The run-length engine (streamguard.design) and a seeded simulation through the real pipeline agree
    within 4 simulation standard errors on settings no table covers: the engine models the kernels."""
    from streamguard.design import arl

    name, params = next(iter(detectors.items()))
    expected = arl(name, params, shift=shift)
    runs = simulate_run_lengths(detectors, shift, replications, length, seed=int(expected) % 1000)
    assert_arl(runs, expected)
