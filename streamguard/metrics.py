"""Prometheus metrics and health endpoints of the live service, read at scrape time.

A custom collector asks the service for a ``MetricsView`` (plain numbers taken under the service's lock)
whenever Prometheus scrapes, so nothing is counted twice and the pipeline keeps its plain arrays:
samples by outcome come straight from ``pipeline.counters``. The collector is registered on a registry
the service owns, never prometheus-client's global one, so tests and several services in one process
stay apart. Per-tag series exist only for an allow-list, capped (every tag label multiplies the series
a Prometheus server must keep).

The same small HTTP server answers ``/metrics``, ``/healthz`` (the process is alive and its processing
thread is turning) and ``/readyz`` (connected, subscribed, limits loaded, journal caught up).
"""

from __future__ import annotations

import json
import threading
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from socketserver import ThreadingMixIn
from typing import Any
from wsgiref.simple_server import WSGIRequestHandler, WSGIServer, make_server

import numpy as np
from prometheus_client import CollectorRegistry
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, HistogramMetricFamily, Metric
from prometheus_client.exposition import CONTENT_TYPE_LATEST, generate_latest
from prometheus_client.registry import Collector

# Receive -> decision latency buckets, seconds: the micro-batch window is tens of milliseconds.
LATENCY_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)


class LatencyHistogram:
    """Counts per bucket (Prometheus ``le`` semantics: a value equal to a bound falls in that bucket)."""

    def __init__(self, bounds: tuple[float, ...] = LATENCY_BUCKETS) -> None:
        self.bounds = np.asarray(bounds, dtype=np.float64)
        self.counts = np.zeros(len(bounds) + 1, dtype=np.int64)
        self.total = 0.0

    def observe(self, seconds: np.ndarray) -> None:
        if seconds.size:
            self.counts += np.bincount(np.searchsorted(self.bounds, seconds, side="left"), minlength=len(self.counts))
            self.total += float(seconds.sum())

    def buckets(self) -> list[tuple[str, float]]:
        cumulative = np.cumsum(self.counts)
        out = [(repr(float(b)), float(c)) for b, c in zip(self.bounds, cumulative[:-1], strict=True)]
        out.append(("+Inf", float(cumulative[-1])))
        return out


@dataclass
class TagSeries:
    tag: str
    samples: dict[str, int]
    raises: dict[str, int]
    in_alarm: int


@dataclass
class MetricsView:
    samples: dict[str, int]
    events: dict[tuple[str, str, str], int]
    decode_failures: dict[str, int]
    duplicates: int
    untracked: dict[str, int]
    messages_received: int
    queue_depth: int
    queue_overflow: int
    latency_buckets: list[tuple[str, float]]
    latency_sum: float
    tags_tracked: int
    tags_in_alarm: int
    broker_connected: bool
    subscribed: bool
    reconnects: int
    outbox_backlog: int
    outbox_rejected: int
    checkpoint_age_s: float | None
    dead_letters: dict[str, int]
    reloads: dict[str, int]
    journal_replayed: int
    journal_errors: int
    tag_series: list[TagSeries] = field(default_factory=list)


def _counter(name: str, doc: str, labels: list[str], values: dict[Any, int]) -> CounterMetricFamily:
    family = CounterMetricFamily(name, doc, labels=labels)
    for key, value in sorted(values.items()):
        family.add_metric(list(key) if isinstance(key, tuple) else [key], value)
    return family


def _gauge(name: str, doc: str, value: float) -> GaugeMetricFamily:
    return GaugeMetricFamily(name, doc, value=value)


class ServiceCollector(Collector):
    """Builds every metric family from one view taken at scrape time."""

    def __init__(self, view: Callable[[], MetricsView]) -> None:
        self.view = view

    def collect(self) -> Iterator[Metric]:
        v = self.view()
        yield _counter("streamguard_samples", "Samples through the quality gate, by outcome (accepted or the "
                       "exclusion reason).", ["outcome"], v.samples)  # fmt: skip
        yield _counter("streamguard_events", "Events raised, by detector, rule and kind.",
                       ["detector", "rule", "kind"], v.events)  # fmt: skip
        yield _counter("streamguard_decode_failures", "Messages (or samples of a batch) refused by the payload "
                       "decoder, by reason.", ["reason"], v.decode_failures)  # fmt: skip
        yield CounterMetricFamily("streamguard_duplicates", "Samples dropped as repeats of an already received "
                                  "(tag, timestamp), as QoS 1 redelivery produces.", value=v.duplicates)  # fmt: skip
        yield _counter("streamguard_samples_untracked", "Samples of tags refused by the unknown-tag policy or the "
                       "max_tags cap.", ["reason"], v.untracked)  # fmt: skip
        yield CounterMetricFamily("streamguard_messages_received", "MQTT messages received.",
                                  value=v.messages_received)  # fmt: skip
        yield _gauge("streamguard_queue_depth", "Messages waiting in memory for the pipeline.", v.queue_depth)
        yield CounterMetricFamily("streamguard_queue_overflow", "Messages that did not fit the in-memory queue and "
                                  "were read back from the journal.", value=v.queue_overflow)  # fmt: skip
        yield HistogramMetricFamily("streamguard_processing_latency_seconds", "From receiving a message to the "
                                    "pipeline's decision on its samples.", buckets=v.latency_buckets,
                                    sum_value=v.latency_sum)  # fmt: skip
        yield _gauge("streamguard_tags_tracked", "Tags in the tag table.", v.tags_tracked)
        yield _gauge("streamguard_tags_in_alarm", "Tags with at least one detector raised.", v.tags_in_alarm)
        yield _gauge("streamguard_broker_connected", "1 while connected to the broker.", float(v.broker_connected))
        yield _gauge("streamguard_subscribed", "1 while the subscription is acknowledged.", float(v.subscribed))
        yield CounterMetricFamily("streamguard_broker_reconnects", "Successful reconnects after the first connect.",
                                  value=v.reconnects)  # fmt: skip
        yield _gauge("streamguard_outbox_backlog", "Outbox messages not yet acknowledged by the broker.",
                     v.outbox_backlog)  # fmt: skip
        yield CounterMetricFamily("streamguard_outbox_rejected", "Outbox messages the broker refused (MQTT 5 "
                                  "reason code).", value=v.outbox_rejected)  # fmt: skip
        yield _gauge("streamguard_checkpoint_age_seconds", "Seconds since the last checkpoint (-1: none yet).",
                     -1.0 if v.checkpoint_age_s is None else v.checkpoint_age_s)  # fmt: skip
        yield _counter("streamguard_dead_letters", "Refused payloads for the dead-letter topic, by outcome.",
                       ["outcome"], v.dead_letters)  # fmt: skip
        yield _counter("streamguard_config_reloads", "SIGHUP reloads, applied or rejected (old config kept).",
                       ["outcome"], v.reloads)  # fmt: skip
        yield CounterMetricFamily("streamguard_journal_replayed", "Journal records processed at start (received "
                                  "before a crash, after the last checkpoint).", value=v.journal_replayed)  # fmt: skip
        yield CounterMetricFamily("streamguard_journal_errors", "Messages that could not be written to the journal.",
                                  value=v.journal_errors)  # fmt: skip
        if v.tag_series:
            samples = CounterMetricFamily("streamguard_tag_samples", "Samples of allow-listed tags, by outcome.",
                                          labels=["tag", "outcome"])  # fmt: skip
            raises = CounterMetricFamily("streamguard_tag_raises", "Raises of allow-listed tags, by detector.",
                                         labels=["tag", "detector"])  # fmt: skip
            in_alarm = GaugeMetricFamily("streamguard_tag_in_alarm", "Detectors raised on allow-listed tags.",
                                         labels=["tag"])  # fmt: skip
            for series in v.tag_series:
                for outcome, count in series.samples.items():
                    samples.add_metric([series.tag, outcome], count)
                for detector, count in series.raises.items():
                    raises.add_metric([series.tag, detector], count)
                in_alarm.add_metric([series.tag], series.in_alarm)
            yield samples
            yield raises
            yield in_alarm


class _ThreadingServer(ThreadingMixIn, WSGIServer):
    daemon_threads = True
    allow_reuse_address = True


class _QuietHandler(WSGIRequestHandler):
    def log_message(self, format: str, *args: Any) -> None:  # noqa: A002 - the base class's name
        pass


Probe = Callable[[], tuple[bool, dict[str, Any]]]


class MetricsServer:
    """``/metrics``, ``/healthz`` and ``/readyz`` on one address, served from a daemon thread."""

    def __init__(self, host: str, port: int, registry: CollectorRegistry, health: Probe, ready: Probe) -> None:
        self.registry = registry
        self.health = health
        self.ready = ready
        self._server = make_server(host, port, self._app, server_class=_ThreadingServer, handler_class=_QuietHandler)
        self.port = int(self._server.server_address[1])
        self._thread = threading.Thread(target=self._server.serve_forever, name="metrics-http", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._server.shutdown()
        self._server.server_close()

    def _app(self, environ: dict[str, Any], start_response: Callable[..., Any]) -> list[bytes]:
        path = environ.get("PATH_INFO", "/")
        if path in ("/healthz", "/readyz"):
            ok, detail = (self.health if path == "/healthz" else self.ready)()
            body = json.dumps({"ok": ok, **detail}).encode()
            start_response("200 OK" if ok else "503 Service Unavailable", [("Content-Type", "application/json")])
            return [body]
        if path in ("/metrics", "/"):
            output = generate_latest(self.registry)
            start_response("200 OK", [("Content-Type", CONTENT_TYPE_LATEST)])
            return [output]
        start_response("404 Not Found", [("Content-Type", "text/plain")])
        return [b"not found: try /metrics, /healthz or /readyz\n"]
