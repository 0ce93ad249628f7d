"""Redundant sensors: time alignment, the derived difference tag, and the windowed pair-bias test."""

from __future__ import annotations

import numpy as np
import pytest

from streamguard.config import parse_config
from streamguard.errors import ConfigError
from streamguard.pipeline import Pipeline
from streamguard.types import Batch

SECOND = 10**9
START = 1_800_000_000 * SECOND


def _config(threshold: float = 0.5, **pair: object) -> object:
    return parse_config({
        "detectors": {"cusum": {"k": 0.5, "h": 10.0}},  # in-control ARL ~7e4 points (design engine)
        "tags": {"TT-DIFF": {"baseline": {"mean": 0.0, "sigma": 0.3}}},
        "pairs": {"TT-DIFF": {"a": "TT-1A", "b": "TT-1B", "tolerance": "2s", "window": "10m",
                              "threshold": threshold, **pair}},
    })  # fmt: skip


def _twin_stream(n: int, bias_from: int, bias: float, seed: int = 5, skew_s: float = 0.7) -> Batch:
    """Two sensors on one process: a shared wandering process value plus independent noise; sensor A
    reads `bias` higher from sample `bias_from` on. B's samples arrive `skew_s` later than A's."""
    rng = np.random.default_rng(seed)
    process = 80.0 + np.cumsum(rng.normal(0, 0.5, n))  # wanders by tens of units: hides any small bias
    a = process + rng.normal(0, 0.2, n) + np.where(np.arange(n) >= bias_from, bias, 0.0)
    b = process + rng.normal(0, 0.2, n)
    ts_a = START + np.arange(n) * 10 * SECOND
    ts_b = ts_a + int(skew_s * SECOND)
    tag = np.empty(2 * n, np.int32)
    ts = np.empty(2 * n, np.int64)
    value = np.empty(2 * n)
    tag[0::2], tag[1::2] = 1, 2  # indices after the derived tag (0): a = 1, b = 2
    ts[0::2], ts[1::2] = ts_a, ts_b
    value[0::2], value[1::2] = a, b
    return Batch.of(tag, ts, value)


def test_pair_members_are_aligned_and_differenced() -> None:
    """Samples within the tolerance are matched one to one; their difference is charted as the pair's tag."""
    pipeline = Pipeline(_config())  # type: ignore[arg-type]
    assert pipeline.tags.names[:3] == ["TT-DIFF", "TT-1A", "TT-1B"]
    batch = Batch.of([1, 2, 1, 1, 2], np.array([0, 1, 10, 20, 25]) * SECOND + START, [5.0, 4.0, 7.0, 9.0, 8.5])
    pipeline.process(batch)
    state = pipeline.pair_state
    # (0s A, 1s B) match: d = 1. A at 10 s is superseded by A at 20 s (unmatched), which B at 25 s finds
    # 5 s away, beyond the 2 s tolerance (unmatched too); B at 25 s is still waiting for a partner.
    assert int(state.matched[0]) == 1
    assert state.unmatched[0].tolist() == [2, 0]
    assert int(pipeline.counters.samples[0].sum()) == 1  # one derived sample reached the gate


def test_bias_between_twins_is_found_despite_a_wandering_process() -> None:
    """A 1.0-unit bias of sensor A (3.3 sigma of the difference) is raised by CUSUM on the difference and by
    pair-bias, which names A as the sensor reading higher; before the bias neither fires."""
    pipeline = Pipeline(_config(threshold=0.5))  # type: ignore[arg-type]
    events = pipeline.process(_twin_stream(4000, bias_from=2000, bias=1.0))
    onset = START + 2000 * 10 * SECOND
    cusum = [e for e in events if e.detector == "cusum" and e.kind == "raise"]
    assert cusum and all(e.ts_ns >= onset for e in cusum)
    assert cusum[0].ts_ns - onset <= 20 * 10 * SECOND  # a 3.3-sigma shift: a handful of points
    bias = [e for e in events if e.rule == "pair-bias" and e.kind == "raise"]
    assert len(bias) == 1 and bias[0].ts_ns > onset and bias[0].direction == "up"
    assert bias[0].note is not None and bias[0].note.startswith("TT-1A reads higher than TT-1B")
    assert 0.5 < bias[0].value < 1.1  # the first biased window may straddle the onset


def test_small_bias_below_threshold_raises_no_pair_bias() -> None:
    """A clear but small bias (0.3 units, threshold 0.5) is not a pair-bias: practical, not just significant."""
    pipeline = Pipeline(_config(threshold=0.5))  # type: ignore[arg-type]
    events = pipeline.process(_twin_stream(4000, bias_from=0, bias=0.3))
    assert [e for e in events if e.rule == "pair-bias"] == []


def test_pairs_are_split_invariant() -> None:
    """Cutting the stream into batches anywhere gives the same events, pairs included."""
    stream = _twin_stream(3000, bias_from=1500, bias=1.0)
    whole = Pipeline(_config())  # type: ignore[arg-type]
    expected = [e.to_dict() for e in sorted(whole.process(stream), key=lambda e: e.sort_key())]
    split = Pipeline(_config())  # type: ignore[arg-type]
    got = []
    for a, b in ((0, 777), (777, 778), (778, 4001), (4001, 6000)):
        got.extend(split.process(stream.slice(a, b)))
    assert [e.to_dict() for e in sorted(got, key=lambda e: e.sort_key())] == expected


def test_a_tag_in_two_pairs_is_an_error() -> None:
    """Each tag belongs to at most one pair; the error names the pair."""
    with pytest.raises(ConfigError, match="pairs.P2: TT-1A is already a member of pair P1"):
        parse_config({"pairs": {"P1": {"a": "TT-1A", "b": "TT-1B", "threshold": 1},
                                "P2": {"a": "TT-1A", "b": "TT-1C", "threshold": 1}}})  # fmt: skip


def test_pair_state_survives_snapshot_and_restore() -> None:
    """Pending partners and open windows are part of the snapshot: a restored pipeline continues exactly."""
    stream = _twin_stream(3000, bias_from=1500, bias=1.0)
    whole = Pipeline(_config())  # type: ignore[arg-type]
    expected = [e.to_dict() for e in sorted(whole.process(stream), key=lambda e: e.sort_key())]
    first = Pipeline(_config())  # type: ignore[arg-type]
    got = first.process(stream.slice(0, 3001))  # cut between A's and B's sample of one instant
    second = Pipeline(_config())  # type: ignore[arg-type]
    assert second.restore(first.snapshot()) == []
    got += second.process(stream.slice(3001, 6000))
    assert [e.to_dict() for e in sorted(got, key=lambda e: e.sort_key())] == expected
