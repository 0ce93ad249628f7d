"""Pipeline properties: batch boundaries do not matter, snapshots resume exactly, quiet data stays quiet,
and the pipeline modules touch no I/O."""

from __future__ import annotations

import ast
import pathlib
import pickle

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from streamguard.pipeline import Pipeline
from streamguard.types import Batch

from .helpers import SECOND, make_config

DETECTORS = {
    "shewhart": {"rules": ["we1", "we2", "we3", "we4", "nelson3", "nelson4", "nelson7", "nelson8"]},
    "cusum": {"k": 0.5, "h": 4.0, "headstart": 0.5},
    "ewma": {"lambda": 0.2, "L": 2.7},
    "spread": {},
}
TAG_SETTINGS = {"stale_after": 6, "max_gap": "30s", "range": [-4.0, 4.0]}


def _stream(seed: int, n: int = 1500, n_tags: int = 3) -> Batch:
    """A messy multi-tag stream: shifts, repeats (stale), gaps, out-of-order rows, bad quality, NaN, spikes."""
    rng = np.random.default_rng(seed)
    tag = rng.integers(0, n_tags, n).astype(np.int32)
    step = rng.choice([1, 1, 1, 1, 45], size=n) * SECOND  # some gaps longer than max_gap
    ts = np.cumsum(step).astype(np.int64) + 1_800_000_000 * SECOND
    swap = rng.random(n) < 0.01  # a few timestamps pulled back: out of order
    ts[swap] -= 120 * SECOND
    value = rng.normal(0, 1, n) + np.where(np.arange(n) > n // 2, 1.0, 0.0)
    value[rng.random(n) < 0.01] = np.nan
    value[rng.random(n) < 0.01] = 9.0  # out of range
    stuck = np.arange(n // 3, n // 3 + 40)
    value[stuck] = 0.25  # stale for whichever tags land there
    quality = rng.choice([0, 0, 0, 0, 0, 0, 1, 2], size=n).astype(np.uint8)
    return Batch.of(tag, ts, value, quality)


def _run(batch: Batch, cuts: list[int], subgroup: dict | None = None) -> list[dict]:
    config = make_config(DETECTORS, TAG_SETTINGS, **({"subgroup": subgroup} if subgroup else {}))
    pipeline = Pipeline(config)
    pipeline.tags.lookup(["T0", "T1", "T2"])
    events = []
    edges = [0, *sorted(set(cuts)), len(batch)]
    for a, b in zip(edges, edges[1:], strict=False):
        if b > a:
            events.extend(pipeline.process(batch.slice(a, b)))
    return [e.to_dict() for e in sorted(events, key=lambda e: e.sort_key())]


_REFERENCE: dict[tuple[int, str], list[dict]] = {}


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 3), cuts=st.lists(st.integers(0, 1500), max_size=8),
       subgroup=st.sampled_from(["individuals", "size", "window"]))  # fmt: skip
def test_any_batch_split_gives_identical_events(seed: int, cuts: list[int], subgroup: str) -> None:
    """Splitting the same samples into batches at any boundaries gives identical events."""
    spec = {"individuals": None, "size": {"size": 4}, "window": {"window": "10s"}}[subgroup]
    batch = _stream(seed)
    key = (seed, subgroup)
    if key not in _REFERENCE:
        _REFERENCE[key] = _run(batch, [], spec)
        assert _REFERENCE[key], "the stream should produce events"
    assert _run(batch, cuts, spec) == _REFERENCE[key]


@settings(max_examples=15, deadline=None)
@given(seed=st.integers(0, 3), cut=st.integers(1, 1499))
def test_snapshot_restore_mid_stream_continues_identically(seed: int, cut: int) -> None:
    """A pipeline restored from a (pickled) snapshot continues exactly as the original would have."""
    batch = _stream(seed)
    config = make_config(DETECTORS, TAG_SETTINGS, subgroup={"window": "10s"})
    straight = Pipeline(config)
    straight.tags.lookup(["T0", "T1", "T2"])
    expected = [e.to_dict() for e in sorted(straight.process(batch), key=lambda e: e.sort_key())]

    first = Pipeline(config)
    first.tags.lookup(["T0", "T1", "T2"])
    events = first.process(batch.slice(0, cut))
    snapshot = pickle.loads(pickle.dumps(first.snapshot()))
    second = Pipeline(config)
    assert second.restore(snapshot) == []
    events += second.process(batch.slice(cut, len(batch)))
    assert [e.to_dict() for e in sorted(events, key=lambda e: e.sort_key())] == expected
    np.testing.assert_array_equal(second.counters.samples[:3], straight.counters.samples[:3])


def test_restore_with_other_limits_restarts_statistics() -> None:
    """A snapshot taken under different limits is not mixed in: the tags' statistics restart, counts stay."""
    config = make_config({"cusum": {}})
    first = Pipeline(config)
    first.tags.lookup(["T0"])
    first.process(Batch.of(np.zeros(3, np.int32), np.arange(1, 4) * SECOND, [2.0, 2.0, 2.0]))
    assert first.detector_state["cusum"].upper[0] > 0
    other = Pipeline(make_config({"cusum": {}}, {"baseline": {"mean": 1.0, "sigma": 1.0}}))
    assert other.restore(first.snapshot()) == ["T0"]
    assert other.detector_state["cusum"].upper[0] == 0
    assert other.counters.samples[0].sum() == 3


@settings(max_examples=30, deadline=None)
@given(n=st.integers(1, 400), subgroup=st.sampled_from([1, 2, 5]), n_tags=st.integers(1, 4))
def test_constant_in_control_data_never_alarms(n: int, subgroup: int, n_tags: int) -> None:
    """Data sitting exactly on the centre line raises no process alarm from any detector
    (rules that flag a lack of variation, such as nelson7, are left out on purpose)."""
    config = make_config({"shewhart": {"rules": ["we1", "we2", "we3", "we4", "nelson3", "nelson4", "nelson8"]},
                          "cusum": {"headstart": 0.5}, "ewma": {}, "spread": {}},
                         subgroup={"size": subgroup})  # fmt: skip
    pipeline = Pipeline(config)
    pipeline.tags.lookup([f"T{i}" for i in range(n_tags)])
    tag = np.tile(np.arange(n_tags, dtype=np.int32), n)
    ts = np.repeat(np.arange(1, n + 1) * SECOND, n_tags)
    events = pipeline.process(Batch.of(tag, ts, np.zeros(n * n_tags)))
    assert [e for e in events if e.kind in ("raise", "clear")] == []


def test_pipeline_modules_do_no_io() -> None:
    """The pure core imports none of the I/O libraries (architecture rule: I/O lives at the edges)."""
    forbidden = {"paho", "prometheus_client", "sqlite3", "socket", "requests", "http", "urllib"}
    core = ["pipeline", "gate", "subgroup", "alarms", "events", "tags", "arrays", "config", "limits", "types"]
    root = pathlib.Path(__file__).resolve().parents[1] / "streamguard"
    files = [root / f"{m}.py" for m in core] + sorted((root / "detectors").glob("*.py"))
    for path in files:
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            names = []
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                names = [node.module]
            for name in names:
                assert name.split(".")[0] not in forbidden, f"{path.name} imports {name}"


def test_restore_with_other_limits_ends_open_alarms_in_the_counters() -> None:
    """When statistics restart, the per-tag count of raised detectors restarts with the alarm state."""
    config = make_config({"cusum": {"h": 4.0}})
    first = Pipeline(config)
    first.tags.lookup(["T0"])
    first.process(Batch.of(np.zeros(5, np.int32), np.arange(1, 6) * SECOND, [3.0] * 5))
    assert first.counters.in_alarm[0] == 1
    other = Pipeline(make_config({"cusum": {"h": 4.0}}, {"baseline": {"mean": 1.0, "sigma": 1.0}}))
    other.restore(first.snapshot())
    assert other.counters.in_alarm[0] == 0 and other.alarm_state["cusum"].alarm[0, 0] == 0
