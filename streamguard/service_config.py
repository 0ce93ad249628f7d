"""The config sections of the live service: where samples come from (``source``), where alarms go
(``output``), the metrics endpoint (``metrics``) and the durable state (``checkpoint``).

``config.py`` adds them to ``Config`` as optional top-level sections; replay and baseline ignore them.
Validation happens here, so the service itself trusts these values. Secrets never appear in a section:
they are named by an environment variable or a file path and read only when connecting.
"""

from __future__ import annotations

import re
import string
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from .durations import parse_duration

_IDENTIFIER = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
MQTT_WILDCARDS = ("+", "#")


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


def _duration(value: str | None) -> str | None:
    if value is not None:
        parse_duration(value)
    return value


def _placeholders(text: str) -> list[str]:
    """Names between braces in a ``str.format`` template; raises ValueError on a malformed one."""
    names = []
    for _literal, name, spec, conversion in string.Formatter().parse(text):
        if name is None:
            continue
        if not _IDENTIFIER.match(name) or spec or conversion:
            raise ValueError(f"{{{name}}} in {text!r}: a placeholder is a plain name such as {{tag}}")
        names.append(name)
    return names


# ---------------------------------------------------------------------------------------------------
# source


class Tls(_Section):
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    verify: bool = True

    @model_validator(mode="after")
    def _cert_and_key_together(self) -> Tls:
        if (self.cert_file is None) != (self.key_file is None):
            raise ValueError("give cert_file and key_file together (a client certificate needs its key)")
        return self


class Backoff(_Section):
    """Reconnect delays: doubling from ``initial`` up to ``max``, each drawn at random in [50 %, 100 %]
    of its nominal value, so a fleet of clients does not reconnect in lock-step after a broker restart."""

    initial: str = "1s"
    max: str = "60s"

    _check = field_validator("initial", "max")(_duration)

    @model_validator(mode="after")
    def _ordered(self) -> Backoff:
        if parse_duration(self.max) < parse_duration(self.initial):
            raise ValueError("max must not be shorter than initial")
        return self


class TopicTemplate(_Section):
    """One subscribed topic shape: ``plant/{area}/{tag}`` names its segments; ``tag`` builds the tag name."""

    template: str
    tag: str = "{tag}"

    @field_validator("template")
    @classmethod
    def _segments(cls, template: str) -> str:
        if not template:
            raise ValueError("a topic template cannot be empty")
        seen: set[str] = set()
        for segment in template.split("/"):
            if segment.startswith("{") and segment.endswith("}"):
                name = segment[1:-1]
                if not _IDENTIFIER.match(name):
                    raise ValueError(f"segment {segment!r}: a placeholder is a plain name such as {{tag}}")
                if name in seen:
                    raise ValueError(f"segment {segment!r} appears twice")
                seen.add(name)
            elif any(ch in segment for ch in "{}+#"):
                raise ValueError(
                    f"segment {segment!r}: a segment is either literal text or a whole placeholder like {{unit}}; "
                    "MQTT wildcards are derived from the placeholders"
                )
        return template

    @model_validator(mode="after")
    def _tag_uses_known_segments(self) -> TopicTemplate:
        segments = set(self.segment_names)
        for name in _placeholders(self.tag):
            if name not in segments and name != "tag":
                raise ValueError(f"tag: {{{name}}} is not a segment of {self.template!r}")
        if not _placeholders(self.tag):
            raise ValueError("tag: use at least one placeholder, e.g. {tag}")
        return self

    @property
    def segment_names(self) -> list[str]:
        return [s[1:-1] for s in self.template.split("/") if s.startswith("{") and s.endswith("}")]

    @property
    def subscription(self) -> str:
        """The MQTT topic filter: every placeholder segment becomes ``+``."""
        return "/".join("+" if s.startswith("{") else s for s in self.template.split("/"))


class MqttSource(_Section):
    host: str = "localhost"
    port: int = Field(1883, ge=1, le=65535)
    client_id: str = Field("streamguard", min_length=1, max_length=64)
    protocol: Literal["3.1.1", "5"] = "5"
    keepalive: int = Field(30, ge=5, le=65535)
    qos: Literal[0, 1, 2] = 1
    # A persistent session (clean start off, stable client id) keeps what is published while we are away.
    # MQTT 5 ends a session this long after the connection drops; MQTT 3.1.1 sessions live until the
    # broker's own expiry (mosquitto: persistent_client_expiration).
    session_expiry: str = "1d"
    clean_start: bool = False
    topics: list[TopicTemplate] = Field(min_length=1)
    username: str | None = None
    password_env: str | None = None
    password_file: str | None = None
    tls: Tls | None = None
    reconnect: Backoff = Backoff()

    _check = field_validator("session_expiry")(_duration)

    @field_validator("client_id")
    @classmethod
    def _client_id_plain(cls, value: str) -> str:
        if any(ch in value for ch in "+#/") or not value.isprintable():
            raise ValueError("use printable characters without +, # or /")
        return value

    @model_validator(mode="after")
    def _one_password_source(self) -> MqttSource:
        if self.password_env and self.password_file:
            raise ValueError("give password_env or password_file, not both")
        if (self.password_env or self.password_file) and not self.username:
            raise ValueError("a password needs a username")
        return self

    @property
    def session_expiry_s(self) -> int:
        return parse_duration(self.session_expiry) // 1_000_000_000


class PayloadKeys(_Section):
    """Key names inside a JSON sample, and of the list in an object holding a gateway batch."""

    timestamp: str = "timestamp"
    value: str = "value"
    quality: str = "quality"
    tag: str = "tag"
    samples: str = "samples"


class Payload(_Section):
    # json: an object per sample, a list of them, or an object holding such a list under keys.samples.
    # number: the payload is a bare number; the receive time is its timestamp and events say so.
    format: Literal["json", "number"] = "json"
    keys: PayloadKeys = PayloadKeys()
    timestamp_format: Literal["auto", "iso", "epoch_s", "epoch_ms"] = "auto"
    quality_encoding: Literal["auto", "opcua", "opc_classic", "bool", "word"] = "auto"
    max_bytes: int = Field(262_144, ge=16, le=268_435_455)
    # A sample stamped further ahead of its receive time than this is refused (a wrong clock would
    # otherwise block the tag: the gate drops everything older than the newest timestamp). null: no check.
    max_future: str | None = "5m"
    # A retained message seeds the pipeline only if its sample is younger than this when received.
    retained_max_age: str | None = "15m"

    _check = field_validator("max_future", "retained_max_age")(_duration)

    @property
    def max_future_ns(self) -> int | None:
        return parse_duration(self.max_future) if self.max_future else None

    @property
    def retained_max_age_ns(self) -> int | None:
        return parse_duration(self.retained_max_age) if self.retained_max_age else None


class SourceSection(_Section):
    mqtt: MqttSource
    payload: Payload = Payload()
    # track: a new tag name gets a slot (monitored when its settings give it limits, counted otherwise);
    # ignore: samples of tags with no limits in the config or limits file are counted and dropped.
    unknown_tags: Literal["track", "ignore"] = "track"
    # Hard cap on tags held, so a flood of new names cannot exhaust memory.
    max_tags: int = Field(100_000, ge=1, le=10_000_000)
    # In-memory queue between the MQTT thread and the pipeline. Every message is journaled on disk
    # first; when the queue is full the pipeline reads the overflow back from the journal.
    queue_messages: int = Field(100_000, ge=10, le=10_000_000)
    # A micro-batch is what arrived within batch_window of its first message, at most batch_samples. The
    # window is most of the delay from receipt to decision when the service keeps up; under load batches
    # grow by themselves (whatever queued while the last one was processed).
    batch_window: str = "10ms"
    batch_samples: int = Field(20_000, ge=1, le=1_000_000)

    _check = field_validator("batch_window")(_duration)

    @property
    def batch_window_s(self) -> float:
        return parse_duration(self.batch_window) / 1e9


# ---------------------------------------------------------------------------------------------------
# output


def _tag_topic(value: str | None) -> str | None:
    if value is None:
        return value
    names = _placeholders(value)
    if any(name != "tag" for name in names):
        raise ValueError("the only placeholder allowed is {tag}")
    if any(w in value for w in MQTT_WILDCARDS) or not value or value.startswith("/"):
        raise ValueError("a topic to publish on has no wildcards and does not start with /")
    return value


class MqttOutput(_Section):
    alarm_topic: str = "streamguard/alarms/{tag}"
    # Retained, per tag: in alarm or not, since when, which detectors. null: not published.
    state_topic: str | None = "streamguard/state/{tag}"
    # Retained: "online" while connected; the broker publishes "offline" (our last will) if we vanish.
    status_topic: str = "streamguard/status"
    # Raw payloads the decoder refused, with the reason. null: not published.
    dead_letter_topic: str | None = "streamguard/dead-letter"
    dead_letters_per_second: float = Field(5.0, gt=0, le=10_000)
    # --shadow puts this in front of every output topic so a site can watch before cutting over.
    shadow_prefix: str = "shadow/"
    # Outbox rows handed to the MQTT client and not yet acknowledged.
    max_in_flight: int = Field(1000, ge=1, le=65_000)

    _topics = field_validator("alarm_topic", "state_topic", "status_topic", "dead_letter_topic")(_tag_topic)

    @field_validator("shadow_prefix")
    @classmethod
    def _prefix(cls, value: str) -> str:
        if any(w in value for w in MQTT_WILDCARDS) or value.startswith("/"):
            raise ValueError("a topic prefix has no wildcards and does not start with /")
        return value


class OutputSection(_Section):
    mqtt: MqttOutput = MqttOutput()
    # Optional audit file: one JSON line per event (the replay schema), appended.
    jsonl: str | None = None


# ---------------------------------------------------------------------------------------------------
# metrics and durable state


class MetricsSection(_Section):
    # host:port of the HTTP server for /metrics, /healthz and /readyz. null: no server.
    listen: str | None = "127.0.0.1:9108"
    # Per-tag series only for tags matching these names or glob patterns, at most max_tag_labels of them
    # (label cardinality: every tag label multiplies the series a Prometheus server stores).
    tag_labels: list[str] = Field(default_factory=list)
    max_tag_labels: int = Field(50, ge=1, le=1000)

    @field_validator("listen")
    @classmethod
    def _host_port(cls, value: str | None) -> str | None:
        if value is None:
            return value
        host, sep, port = value.rpartition(":")
        if not sep or not port.isdigit() or not 0 <= int(port) <= 65535:
            raise ValueError("write host:port, e.g. 0.0.0.0:9108")
        return value

    @property
    def address(self) -> tuple[str, int]:
        assert self.listen is not None
        host, _, port = self.listen.rpartition(":")
        return host.strip("[]") or "0.0.0.0", int(port)


class CheckpointSection(_Section):
    # Holds checkpoint.sqlite, outbox.sqlite and the input journal; must survive restarts (a volume).
    directory: str = "streamguard-state"
    interval: str = "30s"

    _check = field_validator("interval")(_duration)

    @property
    def interval_s(self) -> float:
        return parse_duration(self.interval) / 1e9


SERVICE_SECTIONS = ("source", "output", "metrics", "checkpoint")
