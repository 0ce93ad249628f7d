"""The live service: MQTT in, the same pipeline replay runs, alarm events out; it owns clock, threads and signals.

Threads: paho's network loop (``sources.mqtt``) receives each message, appends it to the input journal
and to a bounded in-memory queue; the main thread takes micro-batches (what arrived within
``batch_window`` of the first message, at most ``batch_samples``), decodes them, runs the pipeline,
writes events to the outbox and JSONL, hands outbox rows to the MQTT client, and checkpoints; a small
HTTP thread serves metrics and health. The pipeline is only touched by the main thread, under a lock
the metrics scrape shares.

Restart and outage guarantee (see the README's service section):

- A sample the broker has delivered is never lost: it is in the journal before paho acknowledges it,
  and at start the service restores the newest checkpoint and processes the journal from the position
  that checkpoint includes. The pipeline therefore sees every delivered sample exactly once, and the
  events are the ones replay gives for the same samples.
- An event is never lost: it is in the outbox before it is published, published in order after an
  outage, and re-raised with the same id if the service died before recording it.
- What can be published twice: an event the broker acknowledged just before the service died, before
  the acknowledgement was recorded, is published again with the same id; consumers de-duplicate by id.
  The JSONL audit file can likewise repeat a line (same id) after a crash.

Signals: SIGTERM (or SIGINT) stops reading, finishes the batch, flushes the outbox, checkpoints,
publishes ``offline`` and exits 0 within 10 s; SIGHUP reloads config and limits, keeping the running
ones (and saying why) when the new ones are invalid.
"""

from __future__ import annotations

import fnmatch
import json
import logging
import signal
import sys
import threading
import time
from collections import deque
from pathlib import Path
from typing import Any, TextIO

import numpy as np
from numba import njit
from prometheus_client import CollectorRegistry

from . import memory
from .arrays import Columns
from .config import DETECTOR_NAMES, BaselineGiven, Config, load_config, resolve_tag
from .decode import DecodedSamples, Decoder
from .errors import ConfigError, StreamguardError
from .events import Event
from .gate import REASONS
from .journal import JournalWriter, Position, read_journal
from .limits import LimitsFile, load_limits  # noqa: F401 - the type of Service.limits
from .metrics import LatencyHistogram, MetricsServer, MetricsView, ServiceCollector, TagSeries
from .pipeline import Pipeline
from .service_config import SERVICE_SECTIONS, CheckpointSection, MetricsSection, OutputSection, SourceSection
from .sinks.jsonl import JsonlSink
from .sinks.mqtt import AlarmBoard, MqttEventSink, event_record
from .sinks.outbox import Outbox
from .sources.mqtt import MqttConnection
from .state import CheckpointStore
from .timeparse import format_time
from .types import Batch

log = logging.getLogger("streamguard.service")


SHUTDOWN_BUDGET_S = 9.0  # SIGTERM to exit, inside the 10 s a container runtime allows by default
REPEAT_DEPTH = 8  # timestamps remembered per tag to recognise redelivered samples
_INT64_MIN = np.iinfo(np.int64).min


# ---------------------------------------------------------------------------------------------------
# logs as JSON lines


class JsonLines(logging.Formatter):
    """One JSON object per line: time, level, logger, message, and the record's ``fields``."""

    def format(self, record: logging.LogRecord) -> str:
        data: dict[str, Any] = {
            "ts": format_time(int(record.created * 1e6) * 1000),
            "level": record.levelname.lower(),
            "logger": record.name,
            "msg": record.getMessage(),
        }
        fields = getattr(record, "fields", None)
        if isinstance(fields, dict):
            data.update(fields)
        if record.exc_info:
            data["error"] = self.formatException(record.exc_info)
        return json.dumps(data, default=str)


def setup_logging(stream: TextIO | None = None, level: int = logging.INFO) -> None:
    root = logging.getLogger("streamguard")
    for handler in list(root.handlers):
        root.removeHandler(handler)
    handler = logging.StreamHandler(stream if stream is not None else sys.stdout)
    handler.setFormatter(JsonLines())
    root.addHandler(handler)
    root.setLevel(level)
    root.propagate = False
    logging.getLogger("streamguard.mqtt.paho").setLevel(logging.WARNING)


def _fields(**values: Any) -> dict[str, Any]:
    return {"fields": values}


# ---------------------------------------------------------------------------------------------------
# pieces


def pipeline_config(config: Config) -> Config:
    """The config without the service's sections: the pipeline (and its checkpoint fingerprint) must not
    change when only a broker address or a metrics port does."""
    return config.model_copy(update={name: None for name in SERVICE_SECTIONS})


class RecentTimestamps(Columns):
    """The last few timestamps passed to the pipeline per tag, newest first."""

    spec = {"recent": (np.int64, (REPEAT_DEPTH,), _INT64_MIN)}


@njit(cache=True)
def drop_repeats(tag, ts, recent, keep):
    """Mark samples whose (tag, timestamp) is among the tag's recent ones; returns how many.

    QoS 1 may deliver a message twice. A repeated timestamp is at or before the newest one the gate has
    seen for the tag, so the gate would drop the sample without touching any state; dropping it here
    only moves its count from the gate's ``duplicate``/``out_of_order`` to the transport's duplicates.
    """
    repeats = 0
    depth = recent.shape[1]
    for i in range(tag.shape[0]):
        t = tag[i]
        x = ts[i]
        seen = False
        for j in range(depth):
            if recent[t, j] == x:
                seen = True
                break
        if seen:
            keep[i] = False
            repeats += 1
        else:
            keep[i] = True
            for j in range(depth - 1, 0, -1):
                recent[t, j] = recent[t, j - 1]
            recent[t, 0] = x
    return repeats


class InboundQueue:
    """Messages between the MQTT thread and the pipeline. Bounded: when full, new messages are only in
    the journal and the pipeline reads them back from there (``overflowing``) until it has caught up."""

    def __init__(self, capacity: int) -> None:
        self.capacity = capacity
        self.items: deque[tuple[str, bytes, int, bool, Position | None]] = deque()
        self.ready = threading.Event()
        self.overflowing = False
        self.overflow_total = 0

    def offer(self, item: tuple[str, bytes, int, bool, Position | None]) -> None:
        """Called with the journal lock held."""
        if self.overflowing or len(self.items) >= self.capacity:
            self.overflowing = True
            self.overflow_total += 1
            return
        self.items.append(item)
        if len(self.items) == 1:
            self.ready.set()


class ServiceSettings:
    """The service sections of a config, with defaults for the optional ones and the shadow switch applied."""

    def __init__(self, config: Config, shadow: bool, where: str) -> None:
        if config.source is None:
            raise ConfigError(f"{where}: source: `streamguard run` needs a source.mqtt section (broker and topics)")
        self.source: SourceSection = config.source
        self.output: OutputSection = config.output or OutputSection()
        self.metrics: MetricsSection = config.metrics or MetricsSection()
        self.checkpoint: CheckpointSection = config.checkpoint or CheckpointSection()
        self.shadow = shadow
        mqtt = self.source.mqtt
        self.client_id = mqtt.client_id + ("-shadow" if shadow else "")
        directory = Path(self.checkpoint.directory)
        self.directory = directory / "shadow" if shadow else directory

    def connection_key(self) -> str:
        """Settings that need a new connection to change."""
        return self.source.mqtt.model_dump_json() + self.client_id


# ---------------------------------------------------------------------------------------------------
# the service


class Service:
    def __init__(self, config_path: str, limits_path: str | None = None, *, shadow: bool = False,
                 install_signals: bool = True, record_latencies: bool = False) -> None:  # fmt: skip
        self.config_path = config_path
        self.limits_path = limits_path
        self.install_signals = install_signals
        config = load_config(config_path)
        limits = load_limits(limits_path) if limits_path else None
        self.settings = ServiceSettings(config, shadow, config_path)
        self.config = config
        self.limits = limits
        self.pipeline = Pipeline(pipeline_config(config), limits)
        self.decoder = Decoder(self.settings.source.payload, self.settings.source.mqtt.topics)
        self.lock = threading.RLock()  # the pipeline and the counters below
        self.journal_lock = threading.Lock()
        directory = self.settings.directory
        directory.mkdir(parents=True, exist_ok=True)
        self.journal_directory = directory / "journal"
        self.journal = JournalWriter(self.journal_directory)
        self.checkpoints = CheckpointStore(directory / "checkpoint.sqlite")
        self.outbox = Outbox(directory / "outbox.sqlite")
        output = self.settings.output
        self.jsonl = JsonlSink(output.jsonl) if output.jsonl else None
        self.inbound = InboundQueue(self.settings.source.queue_messages)
        self.connection = self._connection()
        self.sink = MqttEventSink(self.connection, self.outbox, output.mqtt, shadow)
        self.repeats = RecentTimestamps()
        self.position = self.journal.start
        self.clock_stamped: set[str] = set()
        # counters (plain numbers; the metrics collector reads them at scrape time)
        self.messages_received = 0
        self.samples_decided = 0  # samples decoded and then processed, dropped as repeats or untracked
        self.journal_errors = 0
        self.decode_failures: dict[str, int] = {}
        self.duplicates = 0
        self.untracked: dict[str, int] = {}
        self.events: dict[tuple[str, str, str], int] = {}
        self.reloads = {"applied": 0, "rejected": 0}
        self.journal_replayed = 0
        self.latency = LatencyHistogram()
        self.latencies: list[np.ndarray] | None = [] if record_latencies else None
        self.last_checkpoint_ns: int | None = None
        self.restored = False
        self.heartbeat = time.monotonic()
        self._samples_per_message = 1.0
        self._window_ns = int(self.settings.source.batch_window_s * 1e9)
        self._limits_cache: dict[str, bool] = {}
        self._stopping = False
        self._reload_requested = False
        self.registry = CollectorRegistry(auto_describe=False)
        self.registry.register(ServiceCollector(self.metrics_view))
        self.metrics_server: MetricsServer | None = None

    def _connection(self) -> MqttConnection:
        s = self.settings
        return MqttConnection(
            s.source.mqtt, client_id=s.client_id, persistent=True,
            subscriptions=[t.subscription for t in s.source.mqtt.topics], on_message=self.receive,
            status_topic=self.sink_topics_status(), max_in_flight=s.output.mqtt.max_in_flight,
        )  # fmt: skip

    def sink_topics_status(self) -> str:
        output = self.settings.output.mqtt
        return (output.shadow_prefix if self.settings.shadow else "") + output.status_topic

    # -- the MQTT thread ----------------------------------------------------------------------------------
    def receive(self, topic: str, payload: bytes, retained: bool) -> None:
        """Journal first (before paho acknowledges the message), then queue for the pipeline."""
        received = time.time_ns()
        with self.journal_lock:
            self.messages_received += 1
            try:
                end: Position | None = self.journal.append(topic.encode(), payload, received, retained)
            except OSError:
                self.journal_errors += 1
                end = None
                if self.journal_errors in (1, 10, 100, 1000):
                    log.exception("cannot write the input journal; messages are held in memory only")
            self.inbound.offer((topic, payload, received, retained, end))

    # -- main loop -------------------------------------------------------------------------------------
    def run(self) -> int:
        if self.install_signals:
            signal.signal(signal.SIGTERM, self._on_stop_signal)
            signal.signal(signal.SIGINT, self._on_stop_signal)
            signal.signal(signal.SIGHUP, self._on_reload_signal)
        self._announce()
        if self.settings.metrics.listen is not None:
            host, port = self.settings.metrics.address
            self.metrics_server = MetricsServer(host, port, self.registry, self.health, self.readiness)
            self.metrics_server.start()
            log.info("metrics listening", extra=_fields(host=host, port=self.metrics_server.port))
        self.restore()  # /healthz answers meanwhile; /readyz says not ready until this is done
        self.connection.start()
        interval = self.settings.checkpoint.interval_s
        next_checkpoint = time.monotonic() + interval
        while not self._stopping:
            self.heartbeat = time.monotonic()
            if self._wait_for_batch():
                self._process_pending()
            elif self.inbound.overflowing:
                self._catch_up()
            with self.lock:
                self.sink.pump()
            if time.monotonic() >= next_checkpoint:
                self.checkpoint()
                next_checkpoint = time.monotonic() + interval
            if self._reload_requested:
                self._reload_requested = False
                self.reload()
        return self.shutdown()

    def stop(self) -> None:
        """Ask the main loop to stop (what SIGTERM does)."""
        self._stopping = True

    def _on_stop_signal(self, signum: int, frame: Any) -> None:
        self._stopping = True

    def _on_reload_signal(self, signum: int, frame: Any) -> None:
        self._reload_requested = True

    def _announce(self) -> None:
        s = self.settings
        mqtt = s.source.mqtt
        log.info("starting", extra=_fields(
            config=self.config_path, limits=self.limits_path, limits_version=self.pipeline.tags.limits_version,
            broker=f"{mqtt.host}:{mqtt.port}", client_id=s.client_id, protocol=mqtt.protocol, qos=mqtt.qos,
            topics=[t.template for t in mqtt.topics], state_directory=str(s.directory), shadow=s.shadow,
            alarm_topic=self.sink.topics.alarm, authenticated=bool(mqtt.username),
            tls=mqtt.tls is not None))  # fmt: skip

    def _wait_for_batch(self) -> bool:
        """Wait until a message is queued and its micro-batch is due; False after 0.1 s with none."""
        inbound = self.inbound
        if not inbound.items:
            inbound.ready.wait(0.1)
        try:
            first = inbound.items[0][2]
        except IndexError:
            return False
        linger = (first + self._window_ns - time.time_ns()) / 1e9
        if linger > 0 and len(inbound.items) < self._batch_limit:
            time.sleep(linger)
        return True

    def _process_pending(self) -> None:
        """Take the next micro-batch off the queue and process it."""
        with self.lock:
            inbound = self.inbound
            items: list[tuple[str, bytes, int, bool, Position | None]] = []
            limit = self._batch_limit
            while inbound.items and len(items) < limit:
                items.append(inbound.items.popleft())
            if not inbound.items:
                inbound.ready.clear()
                if inbound.items:
                    inbound.ready.set()
            if items:
                self._process_items(items)
                self.sink.pump()

    @property
    def _batch_limit(self) -> int:
        return max(1, int(self.settings.source.batch_samples / max(self._samples_per_message, 1.0)))

    def _process_items(self, items: list[tuple[str, bytes, int, bool, Position | None]]) -> None:
        end = next((item[4] for item in reversed(items) if item[4] is not None), None)
        self.process([(t, p, r, k) for t, p, r, k, _ in items], end, live=True)

    def _catch_up(self) -> None:
        """Read the messages the full queue turned away back from the journal, until caught up."""
        limit = max(1, int(self.settings.source.batch_samples / max(self._samples_per_message, 1.0)))
        while not self._stopping:
            with self.journal_lock:
                end = self.journal.end
                if end <= self.position:
                    self.inbound.overflowing = False
                    return
            self._process_journal(self.position, end, limit, live=True)

    def _process_journal(self, start: Position, end: Position, limit: int, live: bool) -> int:
        batch: list[tuple[str, bytes, int, bool]] = []
        last = start
        count = 0
        for record in read_journal(self.journal_directory, start, end):
            batch.append((record.topic, record.payload, record.received_ns, record.retained))
            last = record.end
            if len(batch) >= limit:
                self.heartbeat = time.monotonic()
                self.process(batch, last, live=live)
                count += len(batch)
                batch = []
                if self._stopping:
                    return count
        if batch:
            self.process(batch, last, live=live)
            count += len(batch)
        if last < end and not self._stopping:
            # Records the writer completed but that do not read back (damaged on disk): skip them, loudly.
            log.error("journal unreadable; skipped to its end", extra=_fields(
                from_position=[last.segment, last.offset], to_position=[end.segment, end.offset]))  # fmt: skip
            self.position = end
        return count

    # -- processing ----------------------------------------------------------------------------------
    def process(self, messages: list[tuple[str, bytes, int, bool]], end: Position | None, live: bool) -> list[Event]:
        """Decode a micro-batch, run the pipeline, record events; ``end`` is its journal position."""
        decoded = self.decoder.decode(messages)
        if messages:
            self._samples_per_message = 0.8 * self._samples_per_message + 0.2 * (len(decoded) / len(messages))
        with self.lock:
            self._count_refusals(decoded, messages, live)
            batch = self._batch(decoded)
            events = self.pipeline.process(batch) if len(batch) else []
            decided = time.time_ns()
            self.samples_decided += len(decoded)
            if live and messages:
                received = np.fromiter((m[2] for m in messages), dtype=np.int64, count=len(messages))
                seconds = (decided - received) / 1e9
                self.latency.observe(seconds)
                if self.latencies is not None:
                    self.latencies.append(seconds)
            if end is not None:
                self.position = end
            if decoded.clock_stamped:
                self.clock_stamped |= decoded.clock_stamped
            if events:
                self._emit(events)
        return events

    def _count_refusals(self, decoded: DecodedSamples, messages: list[tuple[str, bytes, int, bool]],
                        live: bool) -> None:  # fmt: skip
        if not decoded.refusals:
            return
        for reason, count in decoded.refused_counts().items():
            self.decode_failures[reason] = self.decode_failures.get(reason, 0) + count
        if live:
            for refusal in decoded.refusals:
                topic, payload, received, _retained = messages[refusal.message]
                self.sink.dead_letter(topic, payload, refusal.reason, refusal.detail, received)

    def _batch(self, decoded: DecodedSamples) -> Batch:
        """Tag names to pipeline indices (under the unknown-tag policy and the cap), repeats dropped."""
        tags = self.pipeline.tags
        index = np.empty(len(decoded.names), dtype=np.int32)
        refused: dict[int, str] = {}
        for j, name in enumerate(decoded.names):
            i = tags.index.get(name)
            if i is None:
                reason = self._admission(name)
                if reason is not None:
                    refused[j] = reason
                    index[j] = -1
                    continue
                i = int(tags.lookup([name])[0])
            index[j] = i
        tag = index[decoded.codes] if len(decoded) else np.zeros(0, np.int32)
        ts, value, quality = decoded.ts, decoded.value, decoded.quality
        if refused:
            per_name = np.bincount(decoded.codes, minlength=len(decoded.names))
            for j, reason in refused.items():
                self.untracked[reason] = self.untracked.get(reason, 0) + int(per_name[j])
            kept = tag >= 0
            tag, ts, value, quality = tag[kept], ts[kept], value[kept], quality[kept]
        self.repeats.ensure(len(tags))
        keep = np.empty(tag.shape[0], dtype=np.bool_)
        repeats = drop_repeats(tag, ts, self.repeats.recent, keep) if tag.shape[0] else 0
        if repeats:
            self.duplicates += int(repeats)
            tag, ts, value, quality = tag[keep], ts[keep], value[keep], quality[keep]
        return Batch.of(tag, ts, value, quality)

    def _admission(self, name: str) -> str | None:
        """Why a new tag name is refused a slot, or None to add it."""
        if len(self.pipeline.tags) >= self.settings.source.max_tags:
            return "tag_limit"
        if self.settings.source.unknown_tags == "ignore" and not self._has_limits(name):
            return "unknown_tag"
        return None

    def _has_limits(self, name: str) -> bool:
        known = self._limits_cache.get(name)
        if known is None:
            limits = self.limits.tags.get(name) if self.limits else None
            known = isinstance(resolve_tag(self.config, name).baseline, BaselineGiven) or (
                limits is not None and limits.sigma > 0)  # fmt: skip
            if len(self._limits_cache) >= 100_000:
                self._limits_cache.clear()
            self._limits_cache[name] = known
        return known

    def _emit(self, events: list[Event]) -> None:
        records = [event_record(e, e.tag in self.clock_stamped) for e in events]
        for e in events:
            key = (e.detector, e.rule, e.kind)
            self.events[key] = self.events.get(key, 0) + 1
        if self.jsonl is not None:
            known = self.outbox.known([e.id for e in events])
            self.jsonl.write([r for e, r in zip(events, records, strict=True) if e.id not in known])
        self.outbox.add(self.sink.rows(events, records))
        for e, r in zip(events, records, strict=True):
            if e.detector != "quality" or e.kind in ("stale", "range"):
                log.info("event", extra=_fields(event=r))

    # -- state ---------------------------------------------------------------------------------------
    def restore(self) -> None:
        """Resume from the newest checkpoint, then process the journal written after it."""
        checkpoint = self.checkpoints.load()
        if checkpoint is not None:
            with self.lock:
                restarted = self.pipeline.restore(checkpoint.snapshot)
                n = len(self.pipeline.tags)
                self.repeats.ensure(n)
                recent = checkpoint.extra_arrays.get("repeats")
                if recent is not None and not restarted:
                    self.repeats.load({"recent": recent}, n)
                else:
                    self.repeats.recent[:n, 0] = self.pipeline.gate_state.last_ts[:n]
                self.sink.board = AlarmBoard(checkpoint.extra.get("alarm_board") or {})
                if restarted:
                    self.outbox.add(self.sink.restart_rows(restarted, self.pipeline.tags.limits_version,
                                                           time.time_ns()))  # fmt: skip
                self.clock_stamped = set(checkpoint.extra.get("clock_stamped") or [])
                self.position = checkpoint.position
                self.last_checkpoint_ns = checkpoint.created_ns
            age = (time.time_ns() - checkpoint.created_ns) / 1e9
            log.info("resumed from checkpoint", extra=_fields(
                tags=len(self.pipeline.tags), age_s=round(age, 3), journal_position=[checkpoint.position.segment,
                checkpoint.position.offset], statistics_restarted=len(restarted)))  # fmt: skip
            if restarted:
                log.warning("checkpoint was made with other settings or limits: statistics restarted for these "
                        "tags (counters kept)",
                        extra=_fields(tags=restarted[:50], count=len(restarted)))  # fmt: skip
        else:
            log.info("no checkpoint: starting with empty statistics")
        end = self.journal.end
        if self.position < end:
            count = self._process_journal(self.position, end, 10_000, live=False)
            self.journal_replayed += count
            log.info("journal processed", extra=_fields(messages=count))
        self.restored = True

    def checkpoint(self) -> None:
        with self.lock:
            snapshot = self.pipeline.snapshot()
            n = len(self.pipeline.tags)
            self.repeats.ensure(n)
            recent = self.repeats.to_dict(n)["recent"]
            extra = {"alarm_board": self.sink.board.tags, "clock_stamped": sorted(self.clock_stamped)}
            position = self.position
        taken = time.time_ns()
        with self.journal_lock:
            self.journal.sync()
        self.checkpoints.save(snapshot, position, extra_arrays={"repeats": recent}, extra=extra)
        with self.journal_lock:
            self.journal.drop_before(position)
        self.outbox.prune(taken)
        self.last_checkpoint_ns = taken
        del snapshot, recent
        memory.release_free_memory()  # the snapshot's copies are freed: hand their pages back

    def reload(self) -> None:
        """SIGHUP: new config and limits, or the old ones kept when the new ones are invalid."""
        try:
            config = load_config(self.config_path)
            limits = load_limits(self.limits_path) if self.limits_path else None
            settings = ServiceSettings(config, self.settings.shadow, self.config_path)
        except StreamguardError as exc:
            self.reloads["rejected"] += 1
            log.error("reload rejected; still running on the previous config and limits",
                      extra=_fields(reason=str(exc)))  # fmt: skip
            return
        with self.lock:
            restarted: list[str] = []
            new_pipeline = Pipeline(pipeline_config(config), limits)
            if new_pipeline.fingerprint != self.pipeline.fingerprint or (
                    new_pipeline.tags.limits_version != self.pipeline.tags.limits_version):  # fmt: skip
                restarted = new_pipeline.restore(self.pipeline.snapshot())
                self.pipeline = new_pipeline
                self.outbox.add(self.sink.restart_rows(restarted, new_pipeline.tags.limits_version, time.time_ns()))
                self._limits_cache.clear()
            needs_restart = settings.connection_key() != self.settings.connection_key() or (
                settings.metrics.listen != self.settings.metrics.listen) or (
                settings.directory != self.settings.directory)  # fmt: skip
            self.decoder = Decoder(settings.source.payload, self.settings.source.mqtt.topics)
            self.sink.configure(settings.output.mqtt, settings.shadow)
            old = self.settings
            settings.source = settings.source.model_copy(update={"mqtt": old.source.mqtt})
            settings.metrics = settings.metrics.model_copy(update={"listen": old.metrics.listen})
            settings.directory = old.directory
            self.settings = settings
            self.config = config
            self.limits = limits
            self._window_ns = int(settings.source.batch_window_s * 1e9)
        self.reloads["applied"] += 1
        log.info("reloaded config and limits", extra=_fields(
            limits_version=self.pipeline.tags.limits_version, statistics_restarted=len(restarted),
            restarted_tags=restarted[:50]))  # fmt: skip
        if needs_restart:
            log.warning("broker, topic, state-directory or metrics-address changes take effect at the next restart")

    def shutdown(self) -> int:
        started = time.monotonic()
        deadline = started + SHUTDOWN_BUDGET_S
        log.info("stopping")
        # Finish what is already in memory (bounded); anything left is in the journal for the next start.
        while self.inbound.items and time.monotonic() < deadline - 6.0:
            self._process_pending()
        flushed = self.sink.flush(timeout=max(0.1, min(3.0, deadline - time.monotonic() - 3.0)))
        self.checkpoint()
        self.connection.stop(timeout=max(0.2, min(2.0, deadline - time.monotonic() - 0.5)))
        if self.metrics_server is not None:
            self.metrics_server.stop()
        self.journal.close()
        self.checkpoints.close()
        self.outbox.close()
        if self.jsonl is not None:
            self.jsonl.close()
        log.info("stopped", extra=_fields(seconds=round(time.monotonic() - started, 3), outbox_flushed=flushed,
                                          outbox_backlog=self.outbox.backlog))  # fmt: skip
        return 0

    # -- observation -----------------------------------------------------------------------------------
    def health(self) -> tuple[bool, dict[str, Any]]:
        stalled = time.monotonic() - self.heartbeat
        return stalled < 30.0, {"main_loop_seconds_since_turn": round(stalled, 3)}

    def readiness(self) -> tuple[bool, dict[str, Any]]:
        detail = {
            "connected": self.connection.connected,
            "subscribed": self.connection.subscribed,
            "restored": self.restored,
            "limits_version": self.pipeline.tags.limits_version,
            "tags_with_limits": int(np.count_nonzero(self.pipeline.tags.gate.active[: len(self.pipeline.tags)])),
        }
        limits_ok = self.limits_path is None or self.limits is not None
        ok = bool(self.connection.connected and self.connection.subscribed and self.restored and limits_ok)
        return ok, detail

    def metrics_view(self) -> MetricsView:
        with self.lock:
            pipeline = self.pipeline
            n = len(pipeline.tags)
            samples_array = pipeline.counters.samples[:n]
            totals = samples_array.sum(axis=0) if n else np.zeros(len(REASONS), np.int64)
            series = self._tag_series(pipeline, n)
            view = MetricsView(
                samples={REASONS[r]: int(totals[r]) for r in range(len(REASONS))},
                events=dict(self.events),
                decode_failures=dict(self.decode_failures),
                duplicates=self.duplicates,
                untracked=dict(self.untracked),
                messages_received=self.messages_received,
                queue_depth=len(self.inbound.items),
                queue_overflow=self.inbound.overflow_total,
                latency_buckets=self.latency.buckets(),
                latency_sum=self.latency.total,
                tags_tracked=n,
                tags_in_alarm=self.sink.board.in_alarm_count(),
                broker_connected=self.connection.connected,
                subscribed=self.connection.subscribed,
                reconnects=self.connection.reconnects,
                outbox_backlog=self.outbox.backlog,
                outbox_rejected=self.sink.rejected,
                checkpoint_age_s=None if self.last_checkpoint_ns is None
                else (time.time_ns() - self.last_checkpoint_ns) / 1e9,
                dead_letters=dict(self.sink.dead_letters),
                reloads=dict(self.reloads),
                journal_replayed=self.journal_replayed,
                journal_errors=self.journal_errors,
                tag_series=series,
            )  # fmt: skip
        return view

    def _tag_series(self, pipeline: Pipeline, n: int) -> list[TagSeries]:
        metrics = self.settings.metrics
        if not metrics.tag_labels:
            return []
        out = []
        counters = pipeline.counters
        for t, name in enumerate(pipeline.tags.names[:n]):
            if not any(name == p or fnmatch.fnmatchcase(name, p) for p in metrics.tag_labels):
                continue
            out.append(TagSeries(
                tag=name,
                samples={REASONS[r]: int(counters.samples[t, r]) for r in range(len(REASONS))},
                raises={d: int(counters.raises[t, DETECTOR_NAMES.index(d)]) for d in pipeline.detectors},
                in_alarm=int(counters.in_alarm[t]),
            ))  # fmt: skip
            if len(out) >= metrics.max_tag_labels:
                break
        return out


def run_service(config_path: str, limits_path: str | None, shadow: bool) -> int:
    setup_logging()
    memory.fix_mmap_threshold()  # before the tag table grows (streamguard/memory.py says why)
    service = Service(config_path, limits_path, shadow=shadow)
    return service.run()


__all__ = ["Service", "pipeline_config", "run_service", "setup_logging"]
