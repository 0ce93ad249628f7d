"""Historian files played into an MQTT broker at a chosen speed: the test source for the live service.

``streamguard publish`` reads files with the same reader replay uses (``sources.historian``) and
publishes each sample the way the service's config says it expects them: the topic from the first
``source.mqtt.topics`` template (the tag name read back through its ``tag`` expression), the payload
in ``source.payload``'s format and key names, QoS as configured. Because timestamps are written at
nanosecond precision and values as shortest round-trip decimals, the service decodes exactly what
replay reads, and a service fed this way raises exactly replay's events.

Useful on its own to check a site's broker, ACLs and topic layout before pointing the service at it.
"""

from __future__ import annotations

import json
import os
import re
import string
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, TextIO

from .config import Config
from .errors import ConfigError, UsageError
from .replay import input_settings
from .service_config import MqttSource, Payload, TopicTemplate
from .sources.historian import ReadProblems, read_historian
from .sources.mqtt import MqttConnection
from .timeparse import format_time
from .types import BAD, UNCERTAIN

QUALITY_WORDS = {int(UNCERTAIN): "uncertain", int(BAD): "bad"}
MAX_IN_FLIGHT = 5000


class TopicWriter:
    """The inverse of a topic template: the topic a tag's samples are published on."""

    def __init__(self, template: TopicTemplate, segments: dict[str, str]) -> None:
        self.template = template
        pattern = ""
        from_tag: list[str] = []
        for literal, name, _spec, _conversion in string.Formatter().parse(template.tag):
            pattern += re.escape(literal)
            if name is not None:
                pattern += f"(?P<{name}>.+?)" if name not in from_tag else f"(?P={name})"
                from_tag.append(name)
        self._pattern = re.compile(f"^{pattern}$")
        self._segments = dict(segments)
        missing = [n for n in template.segment_names if n not in from_tag and n not in segments]
        if missing:
            raise UsageError(f"topic template {template.template!r}: give --segment {missing[0]}=VALUE "
                             f"(the tag name does not determine {', '.join(missing)})")  # fmt: skip
        self._cache: dict[str, str | None] = {}

    def topic_for(self, tag: str) -> str | None:
        if tag in self._cache:
            return self._cache[tag]
        match = self._pattern.match(tag)
        topic = None
        if match is not None:
            fields = {**self._segments, **match.groupdict()}
            parts = [fields[s[1:-1]] if s.startswith("{") else s for s in self.template.template.split("/")]
            if all(p and "/" not in p and "+" not in p and "#" not in p for p in parts):
                topic = "/".join(parts)
        self._cache[tag] = topic
        return topic


def _sample_object(payload: Payload, ts_ns: int, value: float, quality: int) -> dict[str, Any]:
    keys = payload.keys
    stamp: Any
    if payload.timestamp_format == "epoch_ms":
        stamp = ts_ns // 1_000_000 if ts_ns % 1_000_000 == 0 else ts_ns / 1e6
    elif payload.timestamp_format == "epoch_s":
        stamp = ts_ns // 1_000_000_000 if ts_ns % 1_000_000_000 == 0 else ts_ns / 1e9
    else:
        stamp = format_time(ts_ns)
    sample: dict[str, Any] = {keys.timestamp: stamp, keys.value: value}
    if quality:
        sample[keys.quality] = QUALITY_WORDS.get(quality, "bad")
    return sample


@dataclass
class PublishResult:
    messages: int = 0
    samples: int = 0
    tags: int = 0
    skipped_tags: int = 0
    seconds: float = 0.0
    unacknowledged: int = 0


def publish_files(config: Config, paths: Sequence[str], *, speed: float = 60.0, host: str | None = None,
                  port: int | None = None, samples_per_message: int = 1, segments: dict[str, str] | None = None,
                  qos: int | None = None, out: TextIO = sys.stderr) -> PublishResult:  # fmt: skip
    """Publish every sample of the files; ``speed`` is data time per wall time (0: as fast as possible)."""
    if config.source is None:
        raise ConfigError("source: `streamguard publish` needs a source.mqtt section (broker, topics, payload)")
    if speed < 0:
        raise UsageError("--speed must be 0 (as fast as possible) or more")
    if samples_per_message < 1:
        raise UsageError("--samples-per-message must be at least 1")
    source = config.source
    payload = source.payload
    if payload.format == "number" and samples_per_message != 1:
        raise UsageError("payload format `number` carries one value per message; use --samples-per-message 1")
    writer = TopicWriter(source.mqtt.topics[0], segments or {})
    update: dict[str, Any] = {}
    if host is not None:
        update["host"] = host
    if port is not None:
        update["port"] = port
    mqtt: MqttSource = source.mqtt.model_copy(update=update)
    level = source.mqtt.qos if qos is None else qos
    connection = MqttConnection(mqtt, client_id=f"{mqtt.client_id}-publish-{os.getpid()}"[:64], persistent=False,
                                max_in_flight=1000)  # fmt: skip
    connection.start()
    if not connection.wait_connected(30.0):
        connection.stop(timeout=0.5, offline=False)
        why = connection.last_error or "no answer"
        raise UsageError(f"cannot connect to the broker at {mqtt.host}:{mqtt.port} ({why})")
    result = PublishResult()
    pending: set[int] = set()
    seen_tags: set[str] = set()
    skipped: set[str] = set()
    buffers: dict[str, list[tuple[int, float, int]]] = {}
    started = time.monotonic()
    first_ts: int | None = None

    def settle(limit: int) -> None:
        while True:
            while connection.acked:
                pending.discard(connection.acked.popleft()[0])
            if len(pending) <= limit:
                return
            time.sleep(0.001)

    def send(topic: str, rows: list[tuple[int, float, int]]) -> None:
        nonlocal first_ts
        ts0 = rows[0][0]
        if speed > 0:
            if first_ts is None:
                first_ts = ts0
            due = started + (ts0 - first_ts) / 1e9 / speed
            wait = due - time.monotonic()
            if wait > 0.002:
                time.sleep(wait)
        if payload.format == "number":
            body = repr(rows[0][1]).encode()
        elif len(rows) == 1 and samples_per_message == 1:
            body = json.dumps(_sample_object(payload, *rows[0]), separators=(",", ":")).encode()
        else:
            body = json.dumps([_sample_object(payload, *r) for r in rows], separators=(",", ":")).encode()
        while True:
            mid = connection.publish(topic, body, qos=level)
            if mid is not None:
                break
            time.sleep(0.05)  # disconnected: paho reconnects; publish again once connected
        if level > 0:
            pending.add(mid)
            if len(pending) >= MAX_IN_FLIGHT:
                settle(MAX_IN_FLIGHT // 2)
        result.messages += 1
        result.samples += len(rows)

    problems = ReadProblems()
    try:
        for chunk in read_historian(list(paths), input_settings(config), problems=problems):
            topics = [writer.topic_for(name) for name in chunk.names]
            for name, topic in zip(chunk.names, topics, strict=True):
                if topic is None:
                    skipped.add(name)
                else:
                    seen_tags.add(name)
            codes = chunk.codes.tolist()
            ts_list = chunk.ts.tolist()
            values = chunk.value.tolist()
            qualities = chunk.quality.tolist()
            for code, ts_ns, value, quality in zip(codes, ts_list, values, qualities, strict=True):
                topic = topics[code]
                if topic is None:
                    continue
                if samples_per_message == 1:
                    send(topic, [(ts_ns, value, quality)])
                    continue
                rows = buffers.setdefault(topic, [])
                rows.append((ts_ns, value, quality))
                if len(rows) >= samples_per_message:
                    send(topic, rows)
                    buffers[topic] = []
        for topic, rows in buffers.items():
            if rows:
                send(topic, rows)
        deadline = time.monotonic() + 60.0
        while time.monotonic() < deadline:
            while connection.acked:
                pending.discard(connection.acked.popleft()[0])
            if not pending:
                break
            time.sleep(0.01)
    finally:
        connection.stop(timeout=1.0, offline=False)
    result.seconds = time.monotonic() - started
    result.tags = len(seen_tags)
    result.skipped_tags = len(skipped)
    result.unacknowledged = len(pending)
    if skipped:
        print(f"tags with no topic under {writer.template.template!r} (skipped): " + ", ".join(sorted(skipped)[:20]),
              file=out)  # fmt: skip
    if problems.rows_skipped:
        print(f"rows the reader skipped: {problems.to_dict()['counts']}", file=out)
    return result
