"""MQTT messages to samples: topic templates name the tag, payloads give time, value and quality.

Sits between the MQTT source and the pipeline in the live service: a micro-batch of raw messages goes
in, columns ready for a ``Batch`` come out (tag names and codes, int64 ns UTC, float64, uint8 quality),
with every refused message or sample counted under a reason and kept for the dead-letter topic.
Nothing here raises past ``DecodeError``, whatever the bytes: bad input from the plant is data to count,
never a reason to stop.

Payloads (``source.payload.format``):

``json``
    an object per sample (``{"timestamp": ..., "value": ..., "quality": ...}``, key names configurable),
    a list of such objects, or an object holding the list under ``keys.samples`` (gateway batches).
    Timestamps are ISO 8601 text (``Z`` or an offset; none means UTC) or epoch seconds or milliseconds;
    ``auto`` reads text as ISO and numbers by magnitude (below 1e11 seconds, below 1e14 milliseconds,
    common practice, the same rule the historian reader applies). A missing quality is good.
``number``
    the payload is a bare number; the receive time is its timestamp, and events of such tags say so.

NaN and infinities are readings like any other here: the quality gate counts them as ``not_finite``,
exactly as replay does with the same values in a file, so live and replay keep the same counts.

Timestamps go through the historian reader's conversions (pyarrow's ISO parser, the epoch scaling in
``timestamps``), so a sample published from a file decodes to the very nanosecond replay reads.

Two paths, one result: messages whose topic names the tag go first through the compiled scanner
(``payload_scan``), which reads the common shapes several times faster than ``json.loads``; whatever it
is not sure of, it hands back whole to the general path here (``json.loads`` and per-sample checks), which
alone decides refusals. The parts are joined in message order, so per tag the arrival order is kept.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from operator import itemgetter
from typing import Any

import numpy as np

from . import epochs, number_text, payload_scan
from .payload_scan import strict_iso_times
from .service_config import Payload, TopicTemplate
from .timeparse import format_time
from .types import BAD, GOOD, UNCERTAIN

# Reasons a message or a sample is refused (metric label values; stable names).
TOO_LARGE = "too_large"
TOPIC_MISMATCH = "topic_mismatch"
BAD_TAG_NAME = "bad_tag_name"
NOT_JSON = "not_json"
NOT_A_NUMBER = "not_a_number"
WRONG_SHAPE = "wrong_shape"
EMPTY = "empty"
MISSING_FIELD = "missing_field"
WRONG_TYPE = "wrong_type"
BAD_QUALITY = "bad_quality"
BAD_TIMESTAMP = "bad_timestamp"
FUTURE_TIMESTAMP = "future_timestamp"
RETAINED_TOO_OLD = "retained_too_old"
DECODER_ERROR = "decoder_error"  # a bug here; counted so it shows, and it costs one message only
REASONS = (TOO_LARGE, TOPIC_MISMATCH, BAD_TAG_NAME, NOT_JSON, NOT_A_NUMBER, WRONG_SHAPE, EMPTY, MISSING_FIELD,
           WRONG_TYPE, BAD_QUALITY, BAD_TIMESTAMP, FUTURE_TIMESTAMP, RETAINED_TOO_OLD, DECODER_ERROR)  # fmt: skip

MAX_TAG_NAME = 512
_CACHE_LIMIT = 200_000  # topics and tag names remembered; cleared when full (a flood of names stays bounded)
_NUMBER_TYPES = frozenset((int, float))
_SCALAR_TYPES = frozenset((str, int, float, bool))  # hashable JSON scalars
_INVALID = 255

_WORDS = {"good": int(GOOD), "uncertain": int(UNCERTAIN), "bad": int(BAD)}
_BOOLEAN_TEXT = {"true": int(GOOD), "false": int(BAD), "1": int(GOOD), "0": int(BAD)}
# OPC UA StatusCode severity, bits 31..30 (OPC 10000-4, Part 4 Services, StatusCode): Good, Uncertain, Bad,
# and the reserved 11 read as Bad, as in ``streamguard.quality``.
_OPCUA_SEVERITY = (int(GOOD), int(UNCERTAIN), int(BAD), int(BAD))


class DecodeError(Exception):
    """A message or sample refused; ``reason`` is one of ``REASONS``."""

    def __init__(self, reason: str, detail: str = "") -> None:
        super().__init__(f"{reason}: {detail}" if detail else reason)
        self.reason = reason
        self.detail = detail


def valid_tag_name(name: object) -> bool:
    """A tag name is printable text without MQTT wildcards, so it can go into an output topic."""
    return (
        type(name) is str
        and 0 < len(name) <= MAX_TAG_NAME
        and "+" not in name
        and "#" not in name
        and name.isprintable()
    )


def quality_code(raw: object, encoding: str) -> int:
    """One quality value from a payload to GOOD / UNCERTAIN / BAD, or 255 when it fits no encoding.

    The encodings are those of ``input.quality_encoding`` (see ``streamguard.quality``). A JSON boolean
    is unambiguous in every encoding; integers need ``opcua`` or ``opc_classic`` (OPC UA Good is 0,
    which the classic quality byte reads as Bad), so ``auto`` refuses them.
    """
    if raw is None:
        return int(GOOD)
    if type(raw) is bool:
        return int(GOOD) if raw else int(BAD)
    if type(raw) is str:
        text = raw.strip().lower()
        if encoding in ("auto", "word") and text in _WORDS:
            return _WORDS[text]
        if encoding in ("auto", "bool") and text in _BOOLEAN_TEXT:
            return _BOOLEAN_TEXT[text]
        if encoding in ("opcua", "opc_classic"):
            try:
                raw = int(text, 0)
            except ValueError:
                return _INVALID
        else:
            return _INVALID
    if type(raw) is float and raw.is_integer():
        raw = int(raw)
    if type(raw) is not int:
        return _INVALID
    if encoding == "bool":
        return int(GOOD) if raw == 1 else int(BAD) if raw == 0 else _INVALID
    if encoding == "opcua" and -(2**31) <= raw < 2**32:
        return _OPCUA_SEVERITY[((raw & 0xFFFFFFFF) >> 30) & 3]
    if encoding == "opc_classic" and 0 <= raw < 2**16:
        # OPC DA quality flags, low byte QQSSSSLL: >= 192 good, 64..191 uncertain, < 64 bad.
        low = raw & 0xFF
        return int(GOOD) if low >= 192 else int(UNCERTAIN) if low >= 64 else int(BAD)
    return _INVALID


class TopicMatcher:
    """Topic templates: which subscribed topic a message came on, and the tag name it gives."""

    def __init__(self, templates: Sequence[TopicTemplate]) -> None:
        self._templates = [(t.template.split("/"), t.tag, "tag" in t.segment_names) for t in templates]
        self._cache: dict[str, str | None] = {}
        # Templates whose tag name is one whole segment (``plant/{area}/{tag}``, the usual case) are read
        # directly, ~0.4 us a topic, and cached nothing: a cache holds every topic string for as long as
        # the service runs (~15 MB with 100,000 tags) to save about 0.3 us a message.
        self._direct: list[tuple[int, list[tuple[int, str]], int]] | None = []
        for segments, expression, _has_tag in self._templates:
            fields = [i for i, segment in enumerate(segments) if segment.startswith("{")]
            named = [i for i in fields if "{" + segments[i][1:-1] + "}" == expression]
            if len(named) != 1 or len({segments[i] for i in fields}) != len(fields):
                self._direct = None
                break
            literals = [(i, segment) for i, segment in enumerate(segments) if not segment.startswith("{")]
            self._direct.append((len(segments), literals, named[0]))

    def tag_of(self, topic: str) -> str | None:
        """The tag name for a topic, or None when the samples must name their tag (no ``{tag}`` segment).

        Raises DecodeError for a topic no template matches or a name that cannot be a tag.
        """
        if self._direct is not None:
            return self._read_directly(topic, self._direct)
        cached = self._cache.get(topic, _MISSING)
        if cached is not _MISSING:
            return cached  # type: ignore[return-value]
        name = self._resolve(topic)
        if len(self._cache) >= _CACHE_LIMIT:
            self._cache.clear()
        self._cache[topic] = name
        return name

    @staticmethod
    def _read_directly(topic: str, direct: list[tuple[int, list[tuple[int, str]], int]]) -> str:
        """``_resolve`` for templates whose tag is one segment: the same answers, without the cache."""
        parts = topic.split("/")
        for length, literals, at in direct:
            if len(parts) != length:
                continue
            for i, literal in literals:
                if parts[i] != literal:
                    break
            else:
                name = parts[at]
                if not valid_tag_name(name):
                    raise DecodeError(BAD_TAG_NAME, f"topic {topic!r} gives tag name {name!r}")
                return name
        raise DecodeError(TOPIC_MISMATCH, f"topic {topic!r} matches no template")

    def _resolve(self, topic: str) -> str | None:
        parts = topic.split("/")
        for segments, expression, has_tag in self._templates:
            if len(parts) != len(segments):
                continue
            fields: dict[str, str] = {}
            for part, segment in zip(parts, segments, strict=True):
                if segment.startswith("{"):
                    fields[segment[1:-1]] = part
                elif part != segment:
                    break
            else:
                if not has_tag and "{tag}" in expression:
                    return None
                name = expression.format(**fields)
                if not valid_tag_name(name):
                    raise DecodeError(BAD_TAG_NAME, f"topic {topic!r} gives tag name {name!r}")
                return name
        raise DecodeError(TOPIC_MISMATCH, f"topic {topic!r} matches no template")

    def fill(self, topic: str, sample_tag: str) -> str:
        """The tag name when the sample supplies ``{tag}``."""
        parts = topic.split("/")
        for segments, expression, _has_tag in self._templates:
            pairs = list(zip(parts, segments, strict=False))
            if len(parts) == len(segments) and all(s.startswith("{") or p == s for p, s in pairs):
                fields = {s[1:-1]: p for p, s in pairs if s.startswith("{")}
                fields["tag"] = sample_tag
                return expression.format(**fields)
        raise DecodeError(TOPIC_MISMATCH, f"topic {topic!r} matches no template")


_MISSING = object()
_json_decode = json.JSONDecoder().decode  # what json.loads uses for text; NaN and Infinity are accepted


class _ReceiveTime:
    """Marks a sample whose timestamp is its message's receive time (a bare number)."""


_RECEIVE_TIME = _ReceiveTime()


@dataclass
class Refusal:
    """Samples of one message that were refused, and why (``count`` 0 when the whole message was)."""

    message: int
    reason: str
    count: int
    detail: str = ""


@dataclass
class DecodedSamples:
    """Columns of the accepted samples of a micro-batch; ``codes`` index ``names``."""

    names: list[str]
    codes: np.ndarray  # int32
    ts: np.ndarray  # int64 ns UTC
    value: np.ndarray  # float64
    quality: np.ndarray  # uint8
    message: np.ndarray  # int32: the message each sample came in
    refusals: list[Refusal] = field(default_factory=list)
    clock_stamped: set[str] = field(default_factory=set)  # tags whose timestamps are receive times

    def __len__(self) -> int:
        return int(self.ts.shape[0])

    def refused_counts(self) -> dict[str, int]:
        """Refused items by reason: samples, or 1 for a message refused as a whole."""
        counts: dict[str, int] = {}
        for r in self.refusals:
            counts[r.reason] = counts.get(r.reason, 0) + max(r.count, 1)
        return counts


class _Columns:
    """Samples of a micro-batch as plain lists, in segments that share a tag and a message."""

    def __init__(self) -> None:
        self.ts: list[Any] = []
        self.value: list[Any] = []
        self.quality: list[int] = []
        self.segment_tag: list[str] = []
        self.segment_length: list[int] = []
        self.segment_message: list[int] = []
        self.segment_received: list[int] = []
        self.segment_retained: list[bool] = []
        self.refusals: list[Refusal] = []
        self.clock_stamped: set[str] = set()


class Decoder:
    """Decode micro-batches of MQTT messages per ``source.payload`` and ``source.mqtt.topics``."""

    def __init__(self, payload: Payload, topics: Sequence[TopicTemplate], *, scanner: bool = True) -> None:
        self.payload = payload
        self.topics = TopicMatcher(topics)
        keys = payload.keys
        self._keys = keys
        self._get_ts = itemgetter(keys.timestamp)
        self._get_value = itemgetter(keys.value)
        self._quality_key = keys.quality
        self._get_quality = itemgetter(keys.quality)
        self._encoding = payload.quality_encoding
        self._max_future = payload.max_future_ns
        self._retained_max_age = payload.retained_max_age_ns
        self._known_names: set[str] = set()
        self._scan_keys = (payload_scan.key_table(keys.timestamp, keys.value, keys.quality, keys.samples)
                           if payload.format == "json" and scanner else None)  # fmt: skip
        self._words = payload_scan.word_table()
        self._words_ok = payload.quality_encoding in ("auto", "word")

    # -- public ------------------------------------------------------------------------------------
    def decode(self, messages: Sequence[tuple[str, bytes, int, bool]]) -> DecodedSamples:
        """Decode (topic, payload, received_ns, retained) messages; never raises."""
        columns = _Columns()
        names: dict[str, int] = {}
        scan: list[tuple[int, str]] = []  # JSON messages whose topic names the tag: for the compiled scanner
        for index, (topic, payload, _received_ns, _retained) in enumerate(messages):
            if self._scan_keys is not None and len(payload) <= self.payload.max_bytes:
                try:
                    tag = self.topics.tag_of(topic)
                except DecodeError:
                    tag = None
                if tag is not None:
                    scan.append((index, tag))
                    continue
            self._add_safely(columns, index, messages[index])
        parts = []
        if scan:
            try:
                part, handed_back = self._scan(messages, scan, names)
            except Exception:  # noqa: BLE001 - the general path reads everything, only slower
                part, handed_back = _Part.empty(), [i for i, _tag in scan]
            parts.append(part)
            for index in handed_back:
                self._add_safely(columns, index, messages[index])
        parts.append(self._general_part(columns, names))
        return self._assemble(parts, names, columns)

    def _add_safely(self, columns: _Columns, index: int, message: tuple[str, bytes, int, bool]) -> None:
        try:
            self._add(columns, index, *message)
        except DecodeError as error:
            columns.refusals.append(Refusal(index, error.reason, 0, error.detail))
        except Exception as error:  # noqa: BLE001 - a decoder bug must cost one message, not the service
            columns.refusals.append(Refusal(index, DECODER_ERROR, 0, f"{type(error).__name__}: {error}"))

    def decode_one(self, topic: str, payload: bytes, received_ns: int = 0, retained: bool = False) -> DecodedSamples:
        """One message; raises DecodeError when nothing of it is accepted (the fuzz-tested entry point)."""
        result = self.decode([(topic, payload, received_ns, retained)])
        if len(result) == 0:
            first = result.refusals[0] if result.refusals else Refusal(0, EMPTY, 0)
            raise DecodeError(first.reason, first.detail)
        return result

    # -- per message -------------------------------------------------------------------------------
    def _add(self, c: _Columns, index: int, topic: str, payload: bytes, received_ns: int, retained: bool) -> None:
        if len(payload) > self.payload.max_bytes:
            raise DecodeError(TOO_LARGE, f"{len(payload)} bytes > max_bytes {self.payload.max_bytes}")
        fixed_tag = self.topics.tag_of(topic)
        if self.payload.format == "number":
            if fixed_tag is None:
                raise DecodeError(MISSING_FIELD, "a bare number needs the tag in the topic")
            try:
                number = float(payload)
            except (ValueError, TypeError):
                raise DecodeError(NOT_A_NUMBER, _preview(payload)) from None
            if retained and self._retained_max_age is not None:
                raise DecodeError(RETAINED_TOO_OLD, "a retained bare number carries no timestamp to judge its age")
            c.ts.append(_RECEIVE_TIME)
            c.value.append(number)
            c.quality.append(int(GOOD))
            c.clock_stamped.add(fixed_tag)
            self._segment(c, fixed_tag, 1, index, received_ns, retained)
            return
        try:
            text = payload.decode("utf-8")
            document = _json_decode(text[1:] if text[:1] == "\ufeff" else text)
        except (ValueError, RecursionError):
            raise DecodeError(NOT_JSON, _preview(payload)) from None
        if type(document) is dict:
            inner = document.get(self._keys.samples)
            if inner is None and fixed_tag is not None and self._single(c, document, fixed_tag, index, received_ns,
                                                                        retained):  # fmt: skip
                return
            samples = inner if type(inner) is list else [document]
        elif type(document) is list:
            samples = document
        else:
            raise DecodeError(WRONG_SHAPE, f"a JSON {type(document).__name__}, not an object or a list")
        if not samples:
            raise DecodeError(EMPTY, "no samples")
        if fixed_tag is None or not self._fast(c, samples, fixed_tag, index, received_ns, retained):
            self._slow(c, samples, topic, fixed_tag, index, received_ns, retained)

    def _single(self, c: _Columns, sample: dict[str, Any], tag: str, index: int, received_ns: int,
                retained: bool) -> bool:  # fmt: skip
        """One object, one sample: the most common payload, taken without building lists."""
        keys = self._keys
        stamp = sample.get(keys.timestamp)
        value = sample.get(keys.value)
        if type(value) not in _NUMBER_TYPES or stamp is None:
            return False
        raw = sample.get(self._quality_key)
        code = int(GOOD) if raw is None else quality_code(raw, self._encoding)
        if code == _INVALID:
            return False
        c.ts.append(stamp)
        c.value.append(value)
        c.quality.append(code)
        if c.segment_tag and c.segment_tag[-1] == tag and c.segment_message[-1] == index:
            c.segment_length[-1] += 1
        else:
            c.segment_tag.append(tag)
            c.segment_length.append(1)
            c.segment_message.append(index)
            c.segment_received.append(received_ns)
            c.segment_retained.append(retained)
        return True

    def _fast(self, c: _Columns, samples: list[Any], tag: str, index: int, received_ns: int, retained: bool) -> bool:
        """The common case in a few C-level passes: every sample an object with a number and a time."""
        try:
            ts = list(map(self._get_ts, samples))
            values = list(map(self._get_value, samples))
        except (KeyError, TypeError, IndexError):
            return False
        if not set(map(type, values)) <= _NUMBER_TYPES:
            return False
        try:
            raw_quality = list(map(self._get_quality, samples))
        except KeyError:
            # Some or all samples without quality. When every object holds exactly the time and the value
            # (the sum of their sizes says so), none has a quality: all good.
            if sum(map(len, samples)) == 2 * len(samples):
                raw_quality = [None]
            else:
                raw_quality = [s.get(self._quality_key) for s in samples]
        kinds = set(map(type, raw_quality))
        if kinds == {type(None)}:
            codes = [int(GOOD)] * len(samples)
        elif len(kinds) == 1 and kinds <= _SCALAR_TYPES and len(distinct := set(raw_quality)) == 1:
            code = quality_code(next(iter(distinct)), self._encoding)
            if code == _INVALID:
                return False
            codes = [code] * len(samples)
        else:
            codes = [quality_code(q, self._encoding) for q in raw_quality]
            if _INVALID in codes:
                return False
        c.ts.extend(ts)
        c.value.extend(values)
        c.quality.extend(codes)
        self._segment(c, tag, len(samples), index, received_ns, retained)
        return True

    def _slow(self, c: _Columns, samples: list[Any], topic: str, fixed_tag: str | None, index: int,
              received_ns: int, retained: bool) -> None:  # fmt: skip
        """Sample by sample, naming the reason for each one refused; the good ones are kept."""
        keys = self._keys
        refused: dict[str, int] = {}
        details: dict[str, str] = {}

        def refuse(reason: str, detail: str) -> None:
            refused[reason] = refused.get(reason, 0) + 1
            details.setdefault(reason, detail)

        for position, sample in enumerate(samples):
            if type(sample) is not dict:
                refuse(WRONG_TYPE, f"sample {position} is a JSON {type(sample).__name__}, not an object")
                continue
            if keys.timestamp not in sample or sample.get(keys.value) is None:
                missing = keys.timestamp if keys.timestamp not in sample else keys.value
                refuse(MISSING_FIELD, f"sample {position} has no {missing!r}")
                continue
            value = sample[keys.value]
            if type(value) not in _NUMBER_TYPES:
                refuse(WRONG_TYPE, f"sample {position}: {keys.value!r} is a JSON {type(value).__name__}, not a number")
                continue
            stamp = sample[keys.timestamp]
            if type(stamp) not in (str, int, float):
                refuse(BAD_TIMESTAMP, f"sample {position}: {keys.timestamp!r} is a JSON {type(stamp).__name__}")
                continue
            code = quality_code(sample.get(keys.quality), self._encoding)
            if code == _INVALID:
                refuse(BAD_QUALITY, f"sample {position}: quality {sample.get(keys.quality)!r} "
                                    f"is not {self._encoding}")  # fmt: skip
                continue
            tag = fixed_tag
            if tag is None:
                named = sample.get(keys.tag)
                if type(named) is not str:
                    refuse(MISSING_FIELD, f"sample {position} has no text {keys.tag!r}")
                    continue
                tag = self._payload_tag(topic, named)
                if tag is None:
                    refuse(BAD_TAG_NAME, f"sample {position}: tag {named[:80]!r}")
                    continue
            c.ts.append(stamp)
            c.value.append(value)
            c.quality.append(code)
            self._segment(c, tag, 1, index, received_ns, retained)
        for reason, count in refused.items():
            c.refusals.append(Refusal(index, reason, count, details[reason]))

    def _payload_tag(self, topic: str, named: str) -> str | None:
        try:
            name = self.topics.fill(topic, named)
        except (DecodeError, ValueError, KeyError, IndexError):
            return None
        if name in self._known_names:
            return name
        if not valid_tag_name(name) or not valid_tag_name(named):
            return None
        if len(self._known_names) >= _CACHE_LIMIT:
            self._known_names.clear()
        self._known_names.add(name)
        return name

    @staticmethod
    def _segment(c: _Columns, tag: str, length: int, index: int, received_ns: int, retained: bool) -> None:
        tags = c.segment_tag
        if tags and tags[-1] == tag and c.segment_message[-1] == index:
            c.segment_length[-1] += length
            return
        tags.append(tag)
        c.segment_length.append(length)
        c.segment_message.append(index)
        c.segment_received.append(received_ns)
        c.segment_retained.append(retained)

    # -- the compiled scanner ------------------------------------------------------------------------
    def _scan(self, messages: Sequence[tuple[str, bytes, int, bool]], scan: list[tuple[int, str]],
              names: dict[str, int]) -> tuple[_Part, list[int]]:  # fmt: skip
        """Samples of the messages the scanner reads; returns them and the messages it hands back."""
        assert self._scan_keys is not None
        payloads = [messages[index][1] for index, _tag in scan]
        blob = b"".join(payloads)
        buffer = np.frombuffer(blob, dtype=np.uint8)
        lengths = np.fromiter(map(len, payloads), dtype=np.int64, count=len(payloads))
        ends = np.cumsum(lengths)
        starts = ends - lengths
        capacity = blob.count(b"{") + 1
        ts_start = np.empty(capacity, np.int64)
        ts_length = np.empty(capacity, np.int64)
        ts_kind = np.empty(capacity, np.int8)
        value_start = np.empty(capacity, np.int64)
        value_length = np.empty(capacity, np.int64)
        quality = np.empty(capacity, np.uint8)
        counts = np.empty(len(scan), np.int64)
        table, key_lengths = self._scan_keys
        n = payload_scan.scan_json_samples(buffer, starts, ends, table, key_lengths, self._words, self._words_ok,
                                           ts_start, ts_length, ts_kind, value_start, value_length, quality,
                                           counts)  # fmt: skip
        accepted = counts >= 0
        per_message = np.where(accepted, counts, 0)
        index = np.asarray([i for i, _t in scan], dtype=np.int32)
        message = np.repeat(index, per_message)
        ts = np.zeros(n, np.int64)
        usable = np.ones(n, bool)
        text = ts_kind[:n] == payload_scan.STRING
        rows = np.flatnonzero(text)
        if rows.size:
            if self.payload.timestamp_format in ("epoch_s", "epoch_ms"):
                usable[rows] = False
            else:
                decided = np.zeros(rows.size, np.bool_)
                found = np.zeros(rows.size, np.int64)
                payload_scan.strict_iso_kernel(buffer, ts_start[rows], ts_length[rows], found, decided)
                ts[rows] = found
                usable[rows] = decided
        rows = np.flatnonzero(~text)
        if rows.size:
            numbers = number_text.parse_spans(buffer, ts_start[rows], ts_length[rows])
            if numbers is None or not np.isfinite(numbers).all():
                usable[rows] = False
            else:
                ts[rows], bad = self._number_times(numbers)
                usable[rows] &= ~bad
        # Compiled and correctly rounded; pyarrow's cast would load pyarrow into the service (tens of MB).
        value = number_text.parse_spans(buffer, value_start[:n], value_length[:n])
        if value is None:
            return _Part.empty(), [i for i, _t in scan]
        usable &= np.isfinite(value)  # inf only from digits beyond float range: the general path decides
        handed = set(index[~accepted].tolist())
        if not usable.all():
            handed.update(message[~usable].tolist())
        keep = ~np.isin(message, np.fromiter(handed, dtype=np.int32, count=len(handed))) if handed else None
        message_code = np.fromiter((names.setdefault(tag, len(names)) for _i, tag in scan), dtype=np.int32,
                                   count=len(scan))  # fmt: skip
        code = np.repeat(message_code, per_message)
        received = np.repeat(np.fromiter((messages[i][2] for i, _t in scan), dtype=np.int64, count=len(scan)),
                             per_message)  # fmt: skip
        retained = np.repeat(np.fromiter((messages[i][3] for i, _t in scan), dtype=np.bool_, count=len(scan)),
                             per_message)  # fmt: skip
        part = _Part(message, code, ts, value, quality[:n].copy(), received, retained)
        if keep is not None:
            part = part.take(keep)
        return part, sorted(handed)

    # -- per micro-batch ---------------------------------------------------------------------------
    def _general_part(self, c: _Columns, names: dict[str, int]) -> _Part:
        """Columns of the samples the general path accepted; refusals by value or time are recorded in c."""
        n = len(c.value)
        if n == 0:
            return _Part.empty()
        lengths = np.asarray(c.segment_length, dtype=np.int64)
        message = np.repeat(np.asarray(c.segment_message, dtype=np.int32), lengths)
        received = np.repeat(np.asarray(c.segment_received, dtype=np.int64), lengths)
        retained = np.repeat(np.asarray(c.segment_retained, dtype=np.bool_), lengths)
        codes = np.asarray([names.setdefault(t, len(names)) for t in c.segment_tag], dtype=np.int32)
        code = np.repeat(codes, lengths)
        ts, bad_ts = self._timestamps(c.ts, received)
        value, bad_value = self._values(c.value)
        quality = np.asarray(c.quality, dtype=np.uint8)
        part = _Part(message, code, ts, value, quality, received, retained)
        bad = bad_value | bad_ts
        if bad.any():
            for reason, mask in ((WRONG_TYPE, bad_value), (BAD_TIMESTAMP, bad_ts & ~bad_value)):
                rows = np.flatnonzero(mask)
                if rows.size:
                    msgs, counts = np.unique(message[rows], return_counts=True)
                    for m, k in zip(msgs.tolist(), counts.tolist(), strict=True):
                        c.refusals.append(Refusal(m, reason, k, _raw_detail(reason, c.ts, rows, message, m)))
            part = part.take(~bad)
        return part

    def _assemble(self, parts: list[_Part], names: dict[str, int], c: _Columns) -> DecodedSamples:
        """Join the parts in message order, refuse by time (future, stale retained), compact the names."""
        part = parts[0] if len(parts) == 1 else _Part.concat(parts)
        if len(parts) > 1 and part.message.size > 1 and (np.diff(part.message) < 0).any():
            part = part.take(np.argsort(part.message, kind="stable"))
        refusals = c.refusals
        checks = []
        if self._max_future is not None:
            checks.append((FUTURE_TIMESTAMP, part.ts > part.received + self._max_future))
        if self._retained_max_age is not None and part.retained.any():
            checks.append((RETAINED_TOO_OLD, part.retained & (part.ts < part.received - self._retained_max_age)))
        refused = np.zeros(part.message.size, bool)
        for reason, mask in checks:
            mask = mask & ~refused
            rows = np.flatnonzero(mask)
            if rows.size:
                msgs, first, counts = np.unique(part.message[rows], return_index=True, return_counts=True)
                for m, f, k in zip(msgs.tolist(), first.tolist(), counts.tolist(), strict=True):
                    refusals.append(Refusal(m, reason, k, _time_detail(reason, int(part.ts[rows[f]]))))
                refused |= mask
        if refused.any():
            part = part.take(~refused)
        code = part.code
        ordered = list(names)
        used = np.unique(code)
        if used.size < len(ordered):
            remap = np.full(max(len(ordered), 1), -1, dtype=np.int32)
            remap[used] = np.arange(used.size, dtype=np.int32)
            ordered = [ordered[u] for u in used.tolist()]
            code = remap[code]
        refusals.sort(key=lambda r: r.message)
        return DecodedSamples(ordered, code.astype(np.int32, copy=False), part.ts, part.value, part.quality,
                              part.message, refusals, c.clock_stamped & set(ordered))  # fmt: skip

    @staticmethod
    def _values(values: list[Any]) -> tuple[np.ndarray, np.ndarray]:
        bad = np.zeros(len(values), dtype=bool)
        try:
            return (np.asarray(values, dtype=np.float64) if values else np.zeros(0)), bad
        except OverflowError:
            # An integer beyond float64 (JSON allows any number of digits): refused as a wrong type.
            out = np.empty(len(values))
            for i, v in enumerate(values):
                try:
                    out[i] = float(v)
                except OverflowError:
                    out[i] = np.nan
                    bad[i] = True
            return out, bad

    def _timestamps(self, raw: list[Any], received: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Raw timestamps (text, numbers, None for receive time) to (int64 ns, bad mask)."""
        n = len(raw)
        if n == 0:
            return np.zeros(0, np.int64), np.zeros(0, bool)
        kinds = set(map(type, raw))
        if kinds == {str}:
            return self._text_times(raw)
        ts = np.zeros(n, dtype=np.int64)
        bad = np.zeros(n, dtype=bool)
        kind_of = [type(x) for x in raw] if len(kinds) > 1 else None
        for kind in kinds:
            rows = np.arange(n) if kind_of is None else np.flatnonzero([k is kind for k in kind_of])
            part = raw if kind_of is None else [raw[i] for i in rows.tolist()]
            if kind is str:
                ts[rows], bad[rows] = self._text_times(part)
            elif kind is _ReceiveTime:
                ts[rows] = received[rows]
            elif kind in _NUMBER_TYPES:
                ts[rows], bad[rows] = self._number_times(part)
            else:
                bad[rows] = True
        return ts, bad

    def _text_times(self, text: list[str]) -> tuple[np.ndarray, np.ndarray]:
        if self.payload.timestamp_format in ("epoch_s", "epoch_ms"):
            return np.zeros(len(text), np.int64), np.ones(len(text), bool)
        ns, done = strict_iso_times(text)
        if done.all():
            return ns, np.zeros(len(text), bool)
        rest = np.flatnonzero(~done)
        rest_ns, rest_bad = self._arrow_times([text[i] for i in rest.tolist()])
        ns[rest] = rest_ns
        bad = np.zeros(len(text), bool)
        bad[rest] = rest_bad
        return ns, bad

    @staticmethod
    def _arrow_times(text: list[str]) -> tuple[np.ndarray, np.ndarray]:
        """ISO text the strict parser left, through pyarrow's parser exactly as the historian reader uses it.

        Imported here, on first need: the strict parser takes the usual forms, and pyarrow costs a
        service that never meets the others tens of MB of resident memory.
        """
        import pyarrow as pa
        import pyarrow.compute as pc

        from . import timestamps

        try:
            array = pa.array(text, type=pa.string())
        except (pa.ArrowException, UnicodeError, ValueError):
            # Text that is not valid Unicode (JSON allows lone surrogates): those cells are bad.
            encodable = [_encodable(t) for t in text]
            array = pa.array([t if ok else None for t, ok in zip(text, encodable, strict=True)], type=pa.string())
        try:
            converted = pc.cast(array, pa.timestamp("ns", tz="UTC"))
            if converted.null_count == 0:
                return converted.view(pa.int64()).to_numpy(), np.zeros(len(text), bool)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            pass
        ns, bad = timestamps.parse_iso(array)  # naive ISO times (UTC) and the bad cells, found one by one
        return ns, bad

    def _number_times(self, numbers: list[Any] | np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        fmt = self.payload.timestamp_format
        try:
            values = np.asarray(numbers, dtype=np.float64)
        except OverflowError:
            values = np.asarray([float(x) if abs(x) < 1e300 else np.inf for x in numbers], dtype=np.float64)
        if fmt == "iso":
            return np.zeros(len(values), np.int64), np.ones(len(values), bool)
        if fmt in ("epoch_s", "epoch_ms"):
            return epochs.epoch_to_ns(values, fmt)
        ns = np.zeros(len(values), np.int64)
        bad = np.ones(len(values), bool)
        magnitude = np.abs(values)
        for unit, mask in (("epoch_s", magnitude < epochs.EPOCH_SECONDS_BELOW),
                           ("epoch_ms", (magnitude >= epochs.EPOCH_SECONDS_BELOW)
                            & (magnitude < epochs.EPOCH_MILLISECONDS_BELOW))):  # fmt: skip
            if mask.any():
                ns[mask], bad[mask] = epochs.epoch_to_ns(values[mask], unit)
        return ns, bad


def _encodable(text: str) -> bool:
    try:
        text.encode("utf-8")
    except UnicodeError:
        return False
    return True


def _preview(payload: bytes, limit: int = 60) -> str:
    text = payload[:limit].decode("utf-8", "replace")
    return repr(text) + ("..." if len(payload) > limit else "")


def _raw_detail(reason: str, raw: list[Any], rows: np.ndarray, message: np.ndarray, m: int) -> str:
    first = int(rows[np.flatnonzero(message[rows] == m)[0]])
    if reason == WRONG_TYPE:
        return "a value beyond the range of float64"
    return f"timestamp {repr(raw[first])[:60]} is not readable"


def _time_detail(reason: str, ts_ns: int) -> str:
    shown = format_time(ts_ns)
    if reason == FUTURE_TIMESTAMP:
        return f"timestamp {shown} is ahead of the receive time by more than max_future"
    return f"retained sample at {shown} is older than retained_max_age"


@dataclass
class _Part:
    """Accepted samples of some messages, as columns (one path's share of a micro-batch)."""

    message: np.ndarray  # int32
    code: np.ndarray  # int32 into the shared names
    ts: np.ndarray
    value: np.ndarray
    quality: np.ndarray
    received: np.ndarray
    retained: np.ndarray

    @classmethod
    def empty(cls) -> _Part:
        return cls(np.zeros(0, np.int32), np.zeros(0, np.int32), np.zeros(0, np.int64), np.zeros(0),
                   np.zeros(0, np.uint8), np.zeros(0, np.int64), np.zeros(0, bool))  # fmt: skip

    def take(self, rows: np.ndarray) -> _Part:
        return _Part(self.message[rows], self.code[rows], self.ts[rows], self.value[rows], self.quality[rows],
                     self.received[rows], self.retained[rows])  # fmt: skip

    @classmethod
    def concat(cls, parts: list[_Part]) -> _Part:
        return cls(*(np.concatenate([getattr(p, f) for p in parts]) for f in
                     ("message", "code", "ts", "value", "quality", "received", "retained")))  # fmt: skip
