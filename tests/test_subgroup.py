"""Subgrouping: counts, time windows, variable n, and what a gap does to an open subgroup."""

from __future__ import annotations

import numpy as np
import pytest

from streamguard.pipeline import Pipeline
from streamguard.subgroup import SubgroupParams, SubgroupState, form_points

from .helpers import SECOND, make_config


def _points(values: list[float], seconds: list[float], size: int = 1, window_s: int = 0,
            restart: list[bool] | None = None):  # type: ignore[no-untyped-def]  # fmt: skip
    n = len(values)
    params, state = SubgroupParams(1), SubgroupState(1)
    params.size[0], params.window[0] = size, window_s * SECOND
    return form_points(np.zeros(n, np.int32), (np.array(seconds) * SECOND).astype(np.int64),
                       np.array(values, float), np.zeros(n, np.uint8),
                       np.array(restart or [False] * n), params, state, all_individuals=False)  # fmt: skip


def test_count_subgroups_mean_and_sd() -> None:
    """size: 3 gives the mean and sample standard deviation (ddof 1) of each 3 accepted samples."""
    p = _points([1, 2, 3, 10, 10, 13, 5], [1, 2, 3, 4, 5, 6, 7], size=3)
    assert p.mean.tolist() == [2.0, 11.0]
    np.testing.assert_allclose(p.sd, [1.0, np.std([10, 10, 13], ddof=1)])
    assert p.n.tolist() == [3, 3] and p.ts.tolist() == [3 * SECOND, 6 * SECOND]


def test_time_windows_close_on_the_next_window_with_variable_n() -> None:
    """window: 10s closes a subgroup when a sample of a later window arrives; n varies with the data."""
    p = _points([1, 3, 5, 7, 9, 100], [1, 4, 12, 15, 18, 35], window_s=10)
    assert p.n.tolist() == [2, 3]
    assert p.mean.tolist() == [2.0, 7.0]
    assert p.ts.tolist() == [10 * SECOND, 20 * SECOND]  # stamped with the window's end


def test_gap_closes_the_open_subgroup_early() -> None:
    """A gap charts the open subgroup with the n it has and marks the next point as a restart."""
    p = _points([1, 2, 3, 4, 5, 6, 7], [1, 2, 3, 4, 50, 51, 52], size=3,
                restart=[False, False, False, False, True, False, False])  # fmt: skip
    assert p.n.tolist() == [3, 1, 3]
    assert p.restart.tolist() == [False, False, True]


def test_subgroup_limits_scale_with_root_n() -> None:
    """A subgroup mean 1.6 sigma above centre with n = 4 is 3.2 standard errors out: Shewhart signals;
    the same deviation as an individual does not (limits on means are sigma/sqrt(n))."""
    for size, expect in ((4, True), (1, False)):
        pipeline = Pipeline(make_config({"shewhart": {"rules": ["we1"]}}, subgroup={"size": size}))
        pipeline.tags.lookup(["T0"])
        from streamguard.types import Batch

        events = pipeline.process(Batch.of(np.zeros(4, np.int32), np.arange(1, 5) * SECOND, [1.6] * 4))
        raised = [e for e in events if e.kind == "raise"]
        assert bool(raised) == expect
        if raised:
            assert raised[0].statistic == pytest.approx(3.2) and raised[0].subgroup_size == 4
