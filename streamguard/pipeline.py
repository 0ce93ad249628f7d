"""The pipeline: quality gate -> subgroups -> detectors -> alarm state -> events, on columnar batches.

Pure and synchronous: no clock, no sockets, no files, no threads. The live service and the replay
tool build it the same way from the same config and limits and hand it batches; splitting the same
samples into batches at any boundaries gives the same events, and ``snapshot()``/``restore()`` carry
the whole state (a handful of arrays plus the tag table) across a restart.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numba import njit

from .alarms import CLEAR, AlarmState, DetectorOutput
from .arrays import Columns
from .config import DETECTOR_NAMES, Config, config_fingerprint
from .detectors.cusum import CusumState, run_cusum
from .detectors.ewma import EwmaState, run_ewma
from .detectors.shewhart import ShewhartState, run_shewhart
from .detectors.spread import SpreadState, run_spread
from .durations import parse_duration
from .events import DIRECTIONS, Event
from .gate import QUALITY_KINDS, QUALITY_RULES, RANGE_START, REASONS, GateState, gate_kernel
from .limits import LimitsFile
from .pairs import PairParams, PairState, Windows, pair_kernel, window_statistics
from .subgroup import Points, SubgroupState, form_points
from .tags import TagTable
from .types import Batch

SHEWHART_RULES = ("", "we1", "we2", "we3", "we4", "nelson1", "nelson2", "nelson3", "nelson4",
                  "nelson5", "nelson6", "nelson7", "nelson8")  # fmt: skip
SPREAD_RULES = ("", "moving_range", "s")

_STATE_TYPES: dict[str, type[Columns]] = {
    "shewhart": ShewhartState,
    "cusum": CusumState,
    "ewma": EwmaState,
    "spread": SpreadState,
}


class Counters(Columns):
    """Plain per-tag counters; the metrics collector and the replay summary read them."""

    spec = {
        "samples": (np.int64, (len(REASONS),), 0),
        "points": (np.int64, (), 0),
        # Transitions, not samples: int32 cannot overflow at any plausible rate and saves 40 bytes a tag.
        "raises": (np.int32, (4,), 0),  # by detector, in DETECTOR_NAMES order
        "quality_events": (np.int32, (len(QUALITY_KINDS),), 0),
        "first_raise_ts": (np.int64, (), 0),
        "in_alarm": (np.int32, (), 0),  # detectors currently raised
    }


@dataclass(frozen=True)
class Prepared:
    """What the stages before the detectors hand on: points, data-quality events, and every sample's outcome."""

    points: Points
    events: list[Event]
    samples: list[tuple[np.ndarray, np.ndarray, np.ndarray]]  # (tag, ts, reason) per gated batch


def astuple_points(points: Points) -> tuple[np.ndarray, ...]:
    return (points.sample, points.tag, points.ts, points.mean, points.sd, points.n, points.restart)


class ModelState(Columns):
    """The previous charted point per tag, for AR(1) residuals."""

    spec = {"previous": (np.float64, (), np.nan)}


class Pipeline:
    """Stages wired in one direction; all state lives in per-tag arrays."""

    def __init__(self, config: Config, limits: LimitsFile | None = None, *, all_active: bool = False) -> None:
        self.config = config
        self.tags = TagTable(config, limits, all_active)
        self.detectors = list(self.tags.detector_params)
        self.gate_state = GateState()
        self.subgroup_state = SubgroupState()
        self.detector_state: dict[str, Columns] = {name: _STATE_TYPES[name]() for name in self.detectors}
        self.alarm_state: dict[str, AlarmState] = {name: AlarmState() for name in self.detectors}
        self.counters = Counters()
        self.model_state = ModelState()
        self.clear_after = config.alarms.clear_after
        self.fingerprint = config_fingerprint(config)
        self._pair_of = np.zeros(0, np.int32)
        self._role_of = np.zeros(0, np.int32)
        self._setup_pairs(config)

    def _setup_pairs(self, config: Config) -> None:
        """Derived tags first, so a pair's difference is charted like any tag, with its own settings."""
        self.pair_names = list(config.pairs)
        n = len(self.pair_names)
        self.pair_params = PairParams(n)
        self.pair_state = PairState(n)
        self.pair_confidence = [config.pairs[name].confidence for name in self.pair_names]
        self.pair_threshold = [config.pairs[name].threshold for name in self.pair_names]
        self.pair_labels = [(config.pairs[name].a, config.pairs[name].b) for name in self.pair_names]
        self._member_of: dict[int, tuple[int, int]] = {}
        for p, name in enumerate(self.pair_names):
            pair = config.pairs[name]
            derived, a, b = self.tags.lookup([name, pair.a, pair.b]).tolist()
            params = self.pair_params
            params.a[p], params.b[p], params.derived[p] = a, b, derived
            params.scale[p], params.offset[p] = pair.scale, pair.offset
            params.tolerance[p] = parse_duration(pair.tolerance)
            params.window[p] = parse_duration(pair.window)
            self._member_of[a] = (p, 0)
            self._member_of[b] = (p, 1)

    # -- state ---------------------------------------------------------------------------------
    def _all_state(self) -> dict[str, Columns]:
        columns: dict[str, Columns] = {"gate": self.gate_state, "subgroup": self.subgroup_state,
                                       "model": self.model_state, "counters": self.counters}  # fmt: skip
        for name in self.detectors:
            columns[f"detector.{name}"] = self.detector_state[name]
            columns[f"alarm.{name}"] = self.alarm_state[name]
        return columns

    def _ensure(self) -> None:
        n = len(self.tags)
        for columns in self._all_state().values():
            columns.ensure(n)
        if self._member_of and self._pair_of.shape[0] < n:
            self._pair_of = np.full(n, -1, np.int32)
            self._role_of = np.zeros(n, np.int32)
            for t, (p, role) in self._member_of.items():
                self._pair_of[t] = p
                self._role_of[t] = role

    def snapshot(self) -> dict[str, Any]:
        """The whole state as plain data: tag names and arrays (round-trips through any store)."""
        n = len(self.tags)
        return {
            "names": list(self.tags.names),
            "config_fingerprint": self.fingerprint,
            "limits_version": self.tags.limits_version,
            "arrays": {key: columns.to_dict(n) for key, columns in self._all_state().items()}
            | {"pairs": self.pair_state.to_dict(len(self.pair_names))},
        }

    def restore(self, snapshot: dict[str, Any]) -> list[str]:
        """Load a snapshot; returns the tags whose statistics were restarted because settings changed.

        A snapshot from a different config or limits is never silently mixed in: every tag's state is
        kept only if the config fingerprint and limits version match, else the statistics restart (the
        tag table and counters are kept, so nothing counted is lost).
        """
        names: list[str] = snapshot["names"]
        self.tags.lookup(names)
        self._ensure()
        n = len(names)
        same = (snapshot.get("config_fingerprint") == self.fingerprint
                and snapshot.get("limits_version") == self.tags.limits_version)  # fmt: skip
        for key, columns in self._all_state().items():
            data = snapshot["arrays"].get(key)
            if data is None:
                continue
            if same or key in ("counters", "gate"):
                columns.load(data, n)
        if same and "pairs" in snapshot["arrays"]:
            self.pair_state.load(snapshot["arrays"]["pairs"], len(self.pair_names))
        if not same:
            self.counters.in_alarm[:n] = 0  # the alarm state restarted with the statistics
        return [] if same else names

    # -- processing ----------------------------------------------------------------------------
    def process(self, batch: Batch) -> list[Event]:
        """Run one batch through every stage; returns its events in time order."""
        prepared = self.prepare(batch)
        events = prepared.events
        points = prepared.points
        if len(points):
            np.add.at(self.counters.points, points.tag, 1)
            events.extend(self._detect(points))
        if len(events) > 1:
            events.sort(key=lambda e: e.ts_ns)
        return events

    def prepare(self, batch: Batch) -> Prepared:
        """The stages before the detectors: gate, pairs (derived samples, gated too), subgroups.

        Phase I uses this directly, so baselines see exactly the samples monitoring will chart.
        """
        self._ensure()
        n = len(batch)
        reason = np.empty(n, np.uint8)
        restart = np.empty(n, np.bool_)
        events = self._gate(batch, reason, restart)
        points = form_points(batch.tag, batch.ts, batch.value, reason, restart, self.tags.subgroup,
                             self.subgroup_state, self.tags.all_individuals)  # fmt: skip
        samples = [(batch.tag, batch.ts, reason)]
        if self.pair_names:
            derived, windows = self._pair(batch, reason)
            if len(derived):
                d_reason = np.empty(len(derived), np.uint8)
                d_restart = np.empty(len(derived), np.bool_)
                events.extend(self._gate(derived, d_reason, d_restart))
                more = form_points(derived.tag, derived.ts, derived.value, d_reason, d_restart, self.tags.subgroup,
                                   self.subgroup_state, self.tags.all_individuals)  # fmt: skip
                points = Points(*(np.concatenate([a, b]) for a, b in zip(astuple_points(points),
                                                                          astuple_points(more), strict=True)))
                samples.append((derived.tag, derived.ts, d_reason))
            events.extend(self._pair_bias(windows))
        return Prepared(points, events, samples)

    def _pair(self, batch: Batch, reason: np.ndarray) -> tuple[Batch, Windows]:
        p, s = self.pair_params, self.pair_state
        n = len(batch)
        out = (np.empty(n, np.int32), np.empty(n, np.int64), np.empty(n, np.float64))
        win = (np.empty(n, np.int64), np.empty(n, np.int64), np.empty(n, np.int64), np.empty(n), np.empty(n),
               np.empty(n))  # fmt: skip
        k, w = pair_kernel(
            batch.tag, batch.ts, batch.value, reason, self._pair_of, self._role_of, p.a, p.b, p.derived, p.scale,
            p.offset, p.tolerance, p.window, s.pending_ts, s.pending_value, s.has_pending, s.unmatched, s.matched,
            s.window_id, s.count, s.total, s.total_sq, s.cross, s.last, *out, *win,
        )  # fmt: skip
        derived = Batch(out[0][:k], out[1][:k], out[2][:k], np.zeros(k, np.uint8))
        return derived, Windows(*(a[:w] for a in win))

    def _pair_bias(self, windows: Windows) -> list[Event]:
        """Raise ``pair-bias`` when a window's interval excludes zero and the bias exceeds the threshold."""
        events: list[Event] = []
        for j in range(windows.pair.shape[0]):
            p = int(windows.pair[j])
            result = window_statistics(windows, j, self.pair_confidence[p])
            threshold = self.pair_threshold[p]
            biased = (result["low"] > 0 or result["high"] < 0) and abs(result["mean"]) > threshold
            raised = bool(self.pair_state.bias_raised[p])
            if biased == raised:
                continue
            self.pair_state.bias_raised[p] = biased
            a, b = self.pair_labels[p]
            higher, lower = (a, b) if result["mean"] > 0 else (b, a)
            t = int(self.pair_params.derived[p])
            note = (f"{higher} reads higher than {lower} by {abs(result['mean']):.4g} "
                    f"({self.pair_confidence[p]:.0%} CI {result['low']:.4g} .. {result['high']:.4g}, "
                    f"n {result['n']:.0f}, effective n {result['effective_n']:.0f}; "
                    f"threshold {threshold:g})")  # fmt: skip
            if not biased:
                note = f"bias no longer both significant and above threshold: mean difference {result['mean']:.4g}"
            events.append(Event(
                tag=self.pair_names[p], detector="pair", rule="pair-bias", kind="raise" if biased else "clear",
                ts_ns=int(windows.end_ts[j]), value=result["mean"], statistic=result["mean"], limit=threshold,
                center=0.0, sigma=result["sd"], subgroup_size=int(result["n"]),
                direction="up" if result["mean"] > 0 else "down", limits_version=self.tags.limits_version,
                units=self.tags.units[t], note=note,
            ))  # fmt: skip
        return events

    def _gate(self, batch: Batch, reason: np.ndarray, restart: np.ndarray) -> list[Event]:
        p, s = self.tags.gate, self.gate_state
        events: list[Event] = []
        start, n, capacity = 0, len(batch), 1024
        while start < n:
            ev_index = np.empty(capacity, np.int64)
            ev_kind = np.empty(capacity, np.uint8)
            ev_statistic = np.empty(capacity)
            ev_limit = np.empty(capacity)
            start, k = gate_kernel(
                start, batch.tag, batch.ts, batch.value, batch.quality,
                p.range_low, p.range_high, p.stale_after, p.max_gap, p.use_uncertain, p.active,
                s.first_ts, s.last_ts, s.last_used_ts, s.last_value, s.same_count, s.is_stale, s.is_out_of_range,
                self.counters.samples, reason, restart, ev_index, ev_kind, ev_statistic, ev_limit,
            )  # fmt: skip
            for j in range(k):
                events.append(self._quality_event(batch, int(ev_index[j]), int(ev_kind[j]),
                                                  float(ev_statistic[j]), float(ev_limit[j])))  # fmt: skip
        return events

    def _quality_event(self, batch: Batch, i: int, kind: int, statistic: float, limit: float) -> Event:
        t = int(batch.tag[i])
        self.counters.quality_events[t, kind] += 1
        direction = "none"
        if kind == RANGE_START:
            direction = "up" if statistic > limit else "down"
        active = bool(self.tags.gate.active[t])
        return Event(
            tag=self.tags.names[t], detector="quality", rule=QUALITY_RULES[kind], kind=QUALITY_KINDS[kind],
            ts_ns=int(batch.ts[i]), value=float(batch.value[i]), statistic=statistic, limit=limit,
            center=float(self.tags.centres.mean[t]) if active else None,
            sigma=float(self.tags.centres.sigma[t]) if active else None,
            subgroup_size=1, direction=direction, limits_version=self.tags.limits_version,
            units=self.tags.settings[t].units,
        )  # fmt: skip

    def standardize(self, points: Points) -> tuple[np.ndarray, np.ndarray]:
        """z = (mean - mu0) / (sigma0 / sqrt(n)): every detector charts standard errors of the point.

        For ``model: ar1`` tags the charted quantity is the one-step residual
        r = (x - mu0) - phi (x_prev - mu0), divided by the residual sigma: nearly independent points, so the
        detectors' designed run lengths hold again. Returns z and the charted values (engineering units).
        """
        centres = self.tags.centres
        if not self.tags.any_ar1:
            return standardize_plain(points.tag, points.mean, points.n, centres.mean, centres.sigma), points.mean
        return standardize_kernel(points.tag, points.mean, points.n, points.restart, centres.mean, centres.sigma,
                                  centres.phi, centres.chart_sigma, self.model_state.previous)  # fmt: skip

    def run_detector(self, name: str, points: Points, z: np.ndarray, charted: np.ndarray | None = None,
                     trace: bool = False) -> DetectorOutput:  # fmt: skip
        """One detector over the batch's points, its alarm state advanced in the same pass."""
        params = self.tags.detector_params[name]
        state = self.detector_state[name]
        alarm = self.alarm_state[name]
        common = (alarm, self.clear_after, trace)
        if name == "shewhart":
            return run_shewhart(points.tag, z, points.restart, params, state, *common)  # type: ignore[arg-type]
        if name == "cusum":
            return run_cusum(points.tag, z, points.restart, params, state, *common)  # type: ignore[arg-type]
        if name == "ewma":
            return run_ewma(points.tag, z, points.restart, params, state, *common)  # type: ignore[arg-type]
        values = points.mean if charted is None else charted
        return run_spread(points.tag, values, points.sd, points.n, self.tags.centres.chart_sigma,
                          points.restart, params, state, *common)  # type: ignore[arg-type]  # fmt: skip

    def _detect(self, points: Points) -> list[Event]:
        z, charted = self.standardize(points)
        events: list[Event] = []
        for name in self.detectors:
            out = self.run_detector(name, points, z, charted)
            if out.point.shape[0]:
                events.extend(self._alarm_events(name, points, out))
        return events

    def _alarm_events(self, name: str, points: Points, out: DetectorOutput) -> list[Event]:
        """Count the transitions and make their Event objects, gathering columns with numpy first."""
        counters = self.counters
        tag = points.tag[out.point]
        ts = points.ts[out.point]
        is_raise = out.kind != CLEAR
        column = DETECTOR_NAMES.index(name)
        np.add.at(counters.raises[:, column], tag[is_raise], 1)
        np.add.at(counters.in_alarm, tag, np.where(is_raise, 1, -1).astype(np.int32))
        raised_tags, first = np.unique(tag[is_raise], return_index=True)
        if raised_tags.size:
            # The earliest raise of any detector (0 = none yet), whatever order detectors are handled in.
            first_ts = ts[is_raise][first]
            current = counters.first_raise_ts[raised_tags]
            counters.first_raise_ts[raised_tags] = np.where(current == 0, first_ts, np.minimum(current, first_ts))
        if name == "shewhart":
            rule_names: tuple[str, ...] = SHEWHART_RULES
        elif name == "spread":
            rule_names = SPREAD_RULES
        else:
            rule_names = (name,) * 2
        names = self.tags.names
        units = self.tags.units
        centres = self.tags.centres
        version = self.tags.limits_version
        return [
            Event(names[t], name, rule_names[r], "raise" if k != CLEAR else "clear", when, value, statistic, limit,
                  mu, sigma, n, DIRECTIONS[d], version, units[t])  # fmt: skip
            for t, r, k, d, when, value, statistic, limit, mu, sigma, n in zip(
                tag.tolist(), out.rule.tolist(), out.kind.tolist(), out.direction.tolist(), ts.tolist(),
                points.mean[out.point].tolist(), out.statistic.tolist(), out.limit.tolist(),
                centres.mean[tag].tolist(), centres.sigma[tag].tolist(), points.n[out.point].tolist(),
                strict=True,
            )
        ]


@njit(cache=True, nogil=True)
def standardize_plain(tag, mean, n, mu, sigma):
    z = np.empty(tag.shape[0])
    for i in range(tag.shape[0]):
        t = tag[i]
        z[i] = (mean[i] - mu[t]) / sigma[t] * np.sqrt(n[i])
    return z


@njit(cache=True, nogil=True)
def standardize_kernel(tag, mean, n, restart, mu, sigma, phi, chart_sigma, previous):
    z = np.empty(tag.shape[0])
    charted = np.empty(tag.shape[0])
    for i in range(tag.shape[0]):
        t = tag[i]
        x = mean[i]
        if phi[t] != 0.0:
            if restart[i] or np.isnan(previous[t]):
                z[i] = (x - mu[t]) / sigma[t]  # no predecessor: the unconditional spread
                charted[i] = x
            else:
                r = (x - mu[t]) - phi[t] * (previous[t] - mu[t])
                z[i] = r / chart_sigma[t]
                charted[i] = mu[t] + r
            previous[t] = x
        else:
            z[i] = (x - mu[t]) / sigma[t] * np.sqrt(n[i])  # the same arithmetic as standardize_plain
            charted[i] = x
    return z, charted
