"""Alarm output over MQTT: events and per-tag state through the outbox, dead letters directly.

Every event becomes an outbox row for the alarm topic (QoS 1, the replay's event schema) and, when
configured, a retained per-tag state row (in alarm or not, since when, which detectors). Rows go to the
MQTT client in outbox order, at most ``max_in_flight`` unacknowledged at a time, and are marked when the
broker's PUBACK arrives. After a disconnect nothing new is handed over until paho has re-sent and the
broker acknowledged what was in flight, so the order on the wire is the order of the outbox; after a
restart the unacknowledged rows go out first, in order, with their original ids.

Dead letters (raw payloads the decoder refused, with the reason) are diagnostics: rate-limited, sent
only while connected, never queued.
"""

from __future__ import annotations

import base64
import json
import time
from collections.abc import Iterable
from typing import Any, Protocol

from ..events import Event
from ..service_config import MqttOutput
from ..timeparse import format_time
from .outbox import Outbox

PROCESS_DETECTORS = ("shewhart", "cusum", "ewma", "spread")
_QUALITY_CONDITIONS = {"stale": ("stale", True), "stale_end": ("stale", False),
                       "range": ("range", True), "range_end": ("range", False)}  # fmt: skip
DEAD_LETTER_PAYLOAD_BYTES = 4096


class Publisher(Protocol):
    connected: bool
    generation: int  # increments on every successful connect
    acked: Any  # deque[tuple[int, bool]]

    def publish(self, topic: str, payload: bytes, qos: int = 1, retain: bool = False) -> int | None: ...


class TopicNames:
    """Output topics with the shadow prefix applied."""

    def __init__(self, output: MqttOutput, shadow: bool) -> None:
        prefix = output.shadow_prefix if shadow else ""
        self.alarm = prefix + output.alarm_topic
        self.state = prefix + output.state_topic if output.state_topic else None
        self.status = prefix + output.status_topic
        self.dead_letter = prefix + output.dead_letter_topic if output.dead_letter_topic else None


class AlarmBoard:
    """Which tags are in alarm, since when and by which detectors; the source of the retained state topic."""

    def __init__(self, data: dict[str, Any] | None = None) -> None:
        self.tags: dict[str, dict[str, Any]] = data or {}

    def apply(self, event: Event) -> bool:
        """Update from one event; True when the tag's published state changes."""
        entry = self.tags.setdefault(event.tag, {"detectors": {}, "quality": {}})
        if event.detector in PROCESS_DETECTORS:
            if event.kind == "raise":
                entry["detectors"][event.detector] = {"rule": event.rule, "since": event.ts_ns,
                                                      "direction": event.direction}  # fmt: skip
            elif event.kind == "clear":
                entry["detectors"].pop(event.detector, None)
            else:
                return False
        elif event.kind in _QUALITY_CONDITIONS:
            condition, active = _QUALITY_CONDITIONS[event.kind]
            if active:
                entry["quality"][condition] = event.ts_ns
            else:
                entry["quality"].pop(condition, None)
        else:
            return False
        if not entry["detectors"] and not entry["quality"]:
            del self.tags[event.tag]
        return True

    def restart(self, tag: str) -> bool:
        """Forget a tag's open alarms (its statistics restarted: no clear event will come); True if it had any."""
        entry = self.tags.get(tag)
        if entry is None or not entry["detectors"]:
            return False
        entry["detectors"] = {}
        if not entry["quality"]:
            del self.tags[tag]
        return True

    def state_of(self, tag: str, event: Event | None, limits_version: str = "") -> dict[str, Any]:
        """The retained state message; ``event`` is the one that changed it (None: statistics restarted)."""
        entry = self.tags.get(tag, {"detectors": {}, "quality": {}})
        detectors = entry["detectors"]
        since = min((d["since"] for d in detectors.values()), default=None)
        return {
            "tag": tag,
            "in_alarm": bool(detectors),
            "since": format_time(since) if since is not None else None,
            "detectors": [{"detector": name, "rule": d["rule"], "direction": d["direction"],
                           "since": format_time(d["since"])} for name, d in sorted(detectors.items())],
            "quality_conditions": [{"condition": name, "since": format_time(ts)}
                                   for name, ts in sorted(entry["quality"].items())],
            "updated_by": event.id if event is not None else "statistics restarted",
            "updated": format_time(event.ts_ns) if event is not None else None,
            "limits_version": event.limits_version if event is not None else limits_version,
        }  # fmt: skip

    def in_alarm_count(self) -> int:
        return sum(1 for entry in self.tags.values() if entry["detectors"])


def event_record(event: Event, clock_stamped: bool) -> dict[str, Any]:
    """The event as published and audited: replay's schema, plus a note when the time is the receive time."""
    record = event.to_dict()
    if clock_stamped:
        record["timestamp_source"] = "received"
    return record


class MqttEventSink:
    def __init__(self, connection: Publisher, outbox: Outbox, output: MqttOutput, shadow: bool,
                 board: AlarmBoard | None = None) -> None:  # fmt: skip
        self.connection = connection
        self.outbox = outbox
        self.configure(output, shadow)
        self.board = board or AlarmBoard()
        self.in_flight: dict[int, int] = {}  # paho mid -> outbox seq
        self.cursor = 0  # highest seq handed to the client since start
        self.held = False  # a disconnect happened with rows in flight: wait for them before sending more
        self.generation = connection.generation
        self.rejected = 0
        self.dead_letters = {"published": 0, "rate_limited": 0, "not_connected": 0}
        self._tokens = self.dead_letter_rate
        self._tokens_at = time.monotonic()

    def configure(self, output: MqttOutput, shadow: bool) -> None:
        self.output = output
        self.topics = TopicNames(output, shadow)
        self.max_in_flight = output.max_in_flight
        self.dead_letter_rate = output.dead_letters_per_second

    # -- events -> outbox ----------------------------------------------------------------------------
    def rows(self, events: Iterable[Event], records: list[dict[str, Any]]) -> list[tuple[str, str, bytes, bool]]:
        """Outbox rows for events (their records already built): the event, then each changed tag's state."""
        rows: list[tuple[str, str, bytes, bool]] = []
        changed: dict[str, Event] = {}
        for event, record in zip(events, records, strict=True):
            rows.append((event.id, self.topics.alarm.format(tag=event.tag),
                         json.dumps(record, separators=(",", ":")).encode(), False))  # fmt: skip
            if self.board.apply(event):
                changed[event.tag] = event
        if self.topics.state is not None:
            for tag, event in changed.items():
                state = self.board.state_of(tag, event)
                rows.append((f"state:{event.id}", self.topics.state.format(tag=tag),
                             json.dumps(state, separators=(",", ":")).encode(), True))  # fmt: skip
        return rows

    def restart_rows(self, tags: Iterable[str], limits_version: str, at_ns: int) -> list[tuple[str, str, bytes, bool]]:
        """State rows for tags whose statistics restarted while in alarm (their alarms end without a clear)."""
        rows: list[tuple[str, str, bytes, bool]] = []
        for tag in tags:
            if self.board.restart(tag) and self.topics.state is not None:
                state = self.board.state_of(tag, None, limits_version)
                rows.append((f"state:restart:{tag}:{at_ns}", self.topics.state.format(tag=tag),
                             json.dumps(state, separators=(",", ":")).encode(), True))  # fmt: skip
        return rows

    # -- outbox -> broker ----------------------------------------------------------------------------
    def pump(self) -> int:
        """Record acknowledgements, then hand pending rows to the client; returns rows handed over."""
        acked = []
        connection = self.connection
        while connection.acked:
            mid, accepted = connection.acked.popleft()
            seq = self.in_flight.pop(mid, None)
            if seq is None:
                continue  # a status or dead-letter message
            if not accepted:
                self.rejected += 1  # the broker refused it (MQTT 5 reason code); retrying would block the rest
            acked.append(seq)
        self.outbox.mark_acked(acked)
        if connection.generation != self.generation:
            self.generation = connection.generation
            self.held = self.held or bool(self.in_flight)
        if not connection.connected:
            if self.in_flight:
                self.held = True
            return 0
        if self.held:
            if self.in_flight:
                return 0  # paho is re-sending these after the reconnect; newer rows wait behind them
            self.held = False
        room = self.max_in_flight - len(self.in_flight)
        if room <= 0 or self.outbox.last_seq <= self.cursor:
            return 0
        sent = 0
        for row in self.outbox.pending(self.cursor, room):
            mid = connection.publish(row.topic, row.payload, qos=1, retain=row.retain)
            if mid is None:
                self.held = bool(self.in_flight)
                break
            self.in_flight[mid] = row.seq
            self.cursor = row.seq
            sent += 1
        return sent

    def flush(self, timeout: float) -> bool:
        """Pump until every row is acknowledged or the time is up; True when the backlog is empty."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            self.pump()
            if self.outbox.backlog == 0:
                return True
            time.sleep(0.01)
        self.pump()
        return self.outbox.backlog == 0

    # -- dead letters ----------------------------------------------------------------------------------
    def dead_letter(self, topic: str, payload: bytes, reason: str, detail: str, received_ns: int) -> None:
        if self.topics.dead_letter is None:
            return
        now = time.monotonic()
        self._tokens = min(self.dead_letter_rate, self._tokens + (now - self._tokens_at) * self.dead_letter_rate)
        self._tokens_at = now
        if self._tokens < 1.0:
            self.dead_letters["rate_limited"] += 1
            return
        if not self.connection.connected:
            self.dead_letters["not_connected"] += 1
            return
        self._tokens -= 1.0
        head = payload[:DEAD_LETTER_PAYLOAD_BYTES]
        try:
            text: str | None = head.decode("utf-8")
        except UnicodeDecodeError:
            text = None
        letter = {
            "reason": reason,
            "detail": detail,
            "topic": topic,
            "received": format_time(received_ns),
            "payload": text,
            "payload_base64": None if text is not None else base64.b64encode(head).decode("ascii"),
            "payload_bytes": len(payload),
            "truncated": len(payload) > DEAD_LETTER_PAYLOAD_BYTES,
        }
        self.connection.publish(self.topics.dead_letter, json.dumps(letter).encode(), qos=1)
        self.dead_letters["published"] += 1
