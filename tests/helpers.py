"""Small builders shared by the tests: a config with given baselines, batches from plain lists."""

from __future__ import annotations

from typing import Any

import numpy as np

from streamguard.config import Config, parse_config
from streamguard.events import Event
from streamguard.pipeline import Pipeline
from streamguard.types import Batch

SECOND = 10**9


def make_config(detectors: dict[str, Any] | None = None, tag_settings: dict[str, Any] | None = None,
                **top: Any) -> Config:  # fmt: skip
    settings: dict[str, Any] = {"baseline": {"mean": 0.0, "sigma": 1.0}}
    settings.update(tag_settings or {})
    data: dict[str, Any] = {"tags": {"*": settings}}
    if detectors is not None:
        data["detectors"] = detectors
    data.update(top)
    return parse_config(data)


def make_pipeline(config: Config, n_tags: int = 1) -> tuple[Pipeline, np.ndarray]:
    pipeline = Pipeline(config)
    index = pipeline.tags.lookup([f"T{i}" for i in range(n_tags)])
    return pipeline, index


def interleaved(values: np.ndarray, period_s: float = 1.0, start_s: float = 1.8e9) -> Batch:
    """values[tag, time] -> one batch with all tags' samples interleaved in time order."""
    n_tags, length = values.shape
    tag = np.tile(np.arange(n_tags, dtype=np.int32), length)
    ts = np.repeat((start_s + np.arange(length) * period_s) * SECOND, n_tags).astype(np.int64)
    return Batch.of(tag, ts, values.T.reshape(-1))


def first_raise_points(pipeline: Pipeline, events: list[Event], length: int, detector: str) -> np.ndarray:
    """Run length (in points) to each tag's first raise; `length + 1` where a tag never raised."""
    n = len(pipeline.tags)
    run = np.full(n, length + 1, dtype=np.int64)
    ts0: dict[int, int] = {}
    for e in events:
        if e.detector == detector and e.kind == "raise":
            t = pipeline.tags.index[e.tag]
            if t not in ts0:
                ts0[t] = e.ts_ns
    return run if not ts0 else _fill(run, ts0)


def _fill(run: np.ndarray, ts0: dict[int, int]) -> np.ndarray:
    start = int(1.8e9 * SECOND)
    for t, ts in ts0.items():
        run[t] = (ts - start) // SECOND + 1
    return run
