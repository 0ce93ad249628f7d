"""Raises against the design: the designed interval and the Poisson flag on constructed tags.

Three tags, individuals every second, 20 000 samples each (seeded), Shewhart rule we1 at 3 sigma only,
whose in-control ARL is 1 / (2 (1 - Phi(3))) = 370.4 points (Montgomery, Introduction to Statistical
Quality Control, the 3-sigma ARL0 of 370; Phi from scipy). Over 19 999 s the design expects 54.0
raises per tag (Poisson sd 7.3):
  - T0 in control: no flag;
  - T1 shifted by +1 sigma (ARL 43.9 points): about 450 signals, far more than designed;
  - T2 with half the baseline's sigma (effectively 6-sigma limits): none, far fewer than designed.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import norm

from streamguard.config import parse_config
from streamguard.pipeline import Pipeline
from streamguard.review.design_check import design_rows
from streamguard.types import Batch

N = 20_000


@pytest.fixture(scope="module")
def rows():
    config = parse_config({
        "detectors": {"shewhart": {"limit": 3.0, "rules": ["we1"]}},
        "alarms": {"clear_after": 1},
        "tags": {"*": {"baseline": {"mean": 0.0, "sigma": 1.0}}},
    })  # fmt: skip
    pipeline = Pipeline(config)
    index = pipeline.tags.lookup(["T0", "T1", "T2"])
    rng = np.random.default_rng(370)
    values = rng.standard_normal((3, N))
    values[1] += 1.0
    values[2] *= 0.5
    ts = (1.8e9 + np.arange(N)) * 1e9
    batch = Batch.of(np.tile(index, N), np.repeat(ts.astype(np.int64), 3), values.T.reshape(-1))
    pipeline.process(batch)
    return {row.tag: row for row in design_rows(pipeline)}


def test_designed_interval_is_arl_times_the_point_period(rows) -> None:
    arl = 1.0 / (2.0 * norm.sf(3.0))
    row = rows["T0"]
    assert row.arl_points == pytest.approx(arl, rel=1e-3)
    assert row.designed_interval_ns == pytest.approx(arl * 1e9, rel=1e-3)
    assert row.expected_raises == pytest.approx((N - 1) / arl, rel=1e-3)


def test_in_control_tag_agrees_with_its_design(rows) -> None:
    row = rows["T0"]
    assert row.flag == ""
    # Within 4 Poisson standard deviations of the 54 expected (the seed is fixed; 4 sd keeps it honest).
    assert abs(row.raises - row.expected_raises) < 4 * np.sqrt(row.expected_raises)


def test_shifted_tag_raises_more_than_designed(rows) -> None:
    assert rows["T1"].flag == "more than designed"
    assert rows["T1"].raises > 3 * rows["T1"].expected_raises


def test_tag_with_too_wide_limits_raises_fewer_than_designed(rows) -> None:
    assert rows["T2"].raises == 0
    assert rows["T2"].flag == "fewer than designed"
