"""Per-sample and per-point detail for the few tags the report draws: values, exclusions, statistics.

The replay keeps only counters and events, so for the figures the tags to be drawn are read again in
one pass over the historian files (only their rows are kept), and run through a fresh pipeline built
from the same config and limits with the detectors' per-point trace switched on. Same pipeline, same
samples, same order: the statistics drawn are the ones that raised the events, from the first sample
on, so a CUSUM drawn from mid-month starts from the state it really had.
"""

from __future__ import annotations

from collections.abc import Collection, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..config import Config
from ..limits import LimitsFile
from ..pipeline import Pipeline
from ..progress import Progress
from ..sources.historian import InputSettings, read_historian
from ..subgroup import form_points
from ..types import Batch


@dataclass
class TagSamples:
    """One tag's samples as read, in file order (the gate decides what is used)."""

    ts: np.ndarray
    value: np.ndarray
    quality: np.ndarray


def collect_samples(paths: Sequence[str | Path], config: Config, wanted: Collection[str], *,
                    show_progress: bool = False) -> dict[str, TagSamples]:  # fmt: skip
    """Read the files once and keep the rows of the ``wanted`` tags (rows the reader skips stay skipped)."""
    wanted = set(wanted)
    parts: dict[str, list[tuple[np.ndarray, np.ndarray, np.ndarray]]] = {name: [] for name in wanted}
    if not wanted:
        return {}
    progress = Progress(len(paths), enabled=show_progress)
    try:
        for chunk in read_historian(list(paths), InputSettings(**config.input.model_dump())):
            keep_code = np.array([name in wanted for name in chunk.names], dtype=np.bool_)
            rows = np.flatnonzero(keep_code[chunk.codes])
            if rows.shape[0]:
                codes = chunk.codes[rows]
                order = np.argsort(codes, kind="stable")
                rows, codes = rows[order], codes[order]
                present, first = np.unique(codes, return_index=True)
                for code, lo, hi in zip(present, first, [*first[1:], rows.shape[0]], strict=True):
                    r = rows[lo:hi]
                    parts[chunk.names[int(code)]].append((chunk.ts[r], chunk.value[r], chunk.quality[r]))
            progress.update(len(chunk), chunk.source)
    finally:
        progress.close()
    out = {}
    for name, pieces in parts.items():
        if pieces:
            out[name] = TagSamples(np.concatenate([p[0] for p in pieces]), np.concatenate([p[1] for p in pieces]),
                                   np.concatenate([p[2] for p in pieces]))  # fmt: skip
    return out


@dataclass
class DetectorTrace:
    statistic: np.ndarray  # per point, in the detector's own units (standard errors for CUSUM and EWMA)
    limit: np.ndarray  # per point: the decision limit the statistic was compared with
    code: np.ndarray  # per point: 0 in control, else the rule that signalled


@dataclass
class TagTrace:
    name: str
    units: str | None
    centre: float
    sigma: float
    ts: np.ndarray  # samples, in the order read
    value: np.ndarray
    reason: np.ndarray  # uint8 gate outcome per sample: 0 used, else the REASONS index
    point_ts: np.ndarray
    point_mean: np.ndarray
    point_n: np.ndarray
    point_charted: np.ndarray  # what the detectors chart, in engineering units (centre + AR(1) residual for ar1 tags)
    phi: float = 0.0  # AR(1) coefficient of ``model: ar1`` tags, else 0
    chart_sigma: float = 1.0  # the sigma the detectors divide by (residual sigma for ar1 tags)
    detectors: dict[str, DetectorTrace] = field(default_factory=dict)
    shewhart_limit: float | None = None  # in standard errors of the point

    @property
    def sample_times(self) -> np.ndarray:
        return np.sort(self.ts)


def trace_tags(config: Config, limits: LimitsFile | None, samples: dict[str, TagSamples]) -> dict[str, TagTrace]:
    """Run the wanted tags through a fresh pipeline, keeping every sample's fate and every point's statistics."""
    if not samples:
        return {}
    pipeline = Pipeline(config, limits)
    names = sorted(samples)
    index = pipeline.tags.lookup(names)
    lengths = [samples[name].ts.shape[0] for name in names]
    batch = Batch.of(np.repeat(index, lengths), np.concatenate([samples[n].ts for n in names]),
                     np.concatenate([samples[n].value for n in names]),
                     np.concatenate([samples[n].quality for n in names]))  # fmt: skip
    # The pipeline's own stages, in its order, with the per-point trace switched on.
    pipeline._ensure()
    reason = np.empty(len(batch), np.uint8)
    restart = np.empty(len(batch), np.bool_)
    pipeline._gate(batch, reason, restart)
    points = form_points(batch.tag, batch.ts, batch.value, reason, restart, pipeline.tags.subgroup,
                         pipeline.subgroup_state, pipeline.tags.all_individuals)  # fmt: skip
    z, charted = pipeline.standardize(points)
    outputs = {name: pipeline.run_detector(name, points, z, charted, trace=True) for name in pipeline.detectors}
    traces = {}
    bounds = np.cumsum([0, *lengths])
    for j, name in enumerate(names):
        t = int(index[j])
        lo, hi = bounds[j], bounds[j + 1]
        mine = np.flatnonzero(points.tag == t)
        trace = TagTrace(
            name=name, units=pipeline.tags.settings[t].units,
            centre=float(pipeline.tags.centres.mean[t]), sigma=float(pipeline.tags.centres.sigma[t]),
            ts=batch.ts[lo:hi], value=batch.value[lo:hi], reason=reason[lo:hi],
            point_ts=points.ts[mine], point_mean=points.mean[mine], point_n=points.n[mine],
            point_charted=charted[mine], phi=float(pipeline.tags.centres.phi[t]),
            chart_sigma=float(pipeline.tags.centres.chart_sigma[t]),
        )  # fmt: skip
        for detector, out in outputs.items():
            trace.detectors[detector] = DetectorTrace(out.trace_statistic[mine], out.trace_limit[mine],
                                                      out.trace_code[mine])  # fmt: skip
        if "shewhart" in pipeline.detectors:
            trace.shewhart_limit = float(pipeline.tags.detector_params["shewhart"].limit[t])
        traces[name] = trace
    return traces
