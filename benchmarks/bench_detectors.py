"""Detector-stage throughput and per-tag memory (issue target: >= 20 M samples/s on one core, for one long
tag and for 10,000 tags x 1,000 samples; <= 1 KB of detector state per tag at 100,000 tags).

The detector stage is the default set (Shewhart with we1-we4, CUSUM, EWMA) with alarm state, over
standardized points; it is timed apart from the gate and subgrouping, and the whole pipeline
(gate -> subgroups -> detectors -> alarm state -> event objects) is timed beside it. In-control normal
data: with rules we1-we4 a tag raises about every 90 points, far more often than a tuned plant tag, so
the event-object figure is a pessimistic one.

    python benchmarks/bench_detectors.py [--runs 5]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from streamguard.config import parse_config  # noqa: E402
from streamguard.pipeline import Pipeline  # noqa: E402
from streamguard.subgroup import form_points  # noqa: E402
from streamguard.types import Batch  # noqa: E402

CONFIG = {
    "detectors": {"shewhart": {"rules": ["we1", "we2", "we3", "we4"]}, "cusum": {}, "ewma": {}},
    "tags": {"*": {"baseline": {"mean": 0.0, "sigma": 1.0}}},
}


def make_batch(n_tags: int, per_tag: int, seed: int = 1) -> Batch:
    rng = np.random.default_rng(seed)
    tag = np.tile(np.arange(n_tags, dtype=np.int32), per_tag)
    ts = np.repeat(np.arange(1, per_tag + 1, dtype=np.int64) * 10**9, n_tags)
    return Batch.of(tag, ts, rng.standard_normal(n_tags * per_tag))


def fresh(n_tags: int) -> Pipeline:
    pipeline = Pipeline(parse_config(CONFIG))
    pipeline.tags.lookup([f"T{i}" for i in range(n_tags)])
    pipeline._ensure()
    return pipeline


def time_detector_stage(n_tags: int, per_tag: int, runs: int) -> list[float]:
    batch = make_batch(n_tags, per_tag)
    rates = []
    for _ in range(runs + 1):  # the first run warms caches and any compilation
        pipeline = fresh(n_tags)
        reason = np.zeros(len(batch), np.uint8)
        restart = np.zeros(len(batch), np.bool_)
        points = form_points(batch.tag, batch.ts, batch.value, reason, restart, pipeline.tags.subgroup,
                             pipeline.subgroup_state, True)  # fmt: skip
        start = time.perf_counter()
        z, _ = pipeline.standardize(points)
        for name in pipeline.detectors:
            pipeline.run_detector(name, points, z)
        rates.append(len(batch) / (time.perf_counter() - start))
    return rates[1:]


def time_pipeline(n_tags: int, per_tag: int, runs: int) -> tuple[list[float], int]:
    batch = make_batch(n_tags, per_tag)
    rates = []
    events = 0
    for _ in range(runs + 1):
        pipeline = fresh(n_tags)
        start = time.perf_counter()
        events = len(pipeline.process(batch))
        rates.append(len(batch) / (time.perf_counter() - start))
    return rates[1:], events


def state_bytes_per_tag(n_tags: int) -> float:
    pipeline = fresh(n_tags)
    total = 0
    for columns in (pipeline.gate_state, pipeline.subgroup_state, *pipeline.detector_state.values(),
                    *pipeline.alarm_state.values()):  # fmt: skip
        total += sum(a[:n_tags].nbytes for a in columns.to_dict(n_tags).values())
    return total / n_tags


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--runs", type=int, default=5)
    args = parser.parse_args()
    print(f"detector stage: Shewhart(we1-we4) + CUSUM + EWMA + alarm state; median of {args.runs} runs")
    for label, n_tags, per_tag in (("1 tag x 10,000,000", 1, 10_000_000), ("10,000 tags x 1,000", 10_000, 1_000)):
        rates = time_detector_stage(n_tags, per_tag, args.runs)
        median = statistics.median(rates)
        print(f"  {label:<22} {median / 1e6:7.1f} M samples/s  (target 20; ratio {median / 20e6:.2f})")
    print("whole pipeline (gate, subgroups, detectors, alarm state, event objects):")
    for label, n_tags, per_tag in (("1 tag x 10,000,000", 1, 10_000_000), ("10,000 tags x 1,000", 10_000, 1_000)):
        rates, events = time_pipeline(n_tags, per_tag, args.runs)
        print(f"  {label:<22} {statistics.median(rates) / 1e6:7.1f} M samples/s  ({events:,} events per run)")
    per_tag = state_bytes_per_tag(100_000)
    print(f"state per tag at 100,000 tags (gate, subgroup, detectors, alarms): {per_tag:.0f} bytes (target <= 1024)")


if __name__ == "__main__":
    main()
