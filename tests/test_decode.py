"""The MQTT payload decoder: topic templates, payload forms, refusals by reason, timestamps read exactly as the
historian reader reads them, and no exception but DecodeError whatever the bytes (hypothesis)."""

from __future__ import annotations

import json
import math
from datetime import UTC, datetime, timedelta, timezone
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from streamguard.config import parse_config
from streamguard.decode import (
    BAD_QUALITY,
    BAD_TAG_NAME,
    BAD_TIMESTAMP,
    DECODER_ERROR,
    EMPTY,
    FUTURE_TIMESTAMP,
    MISSING_FIELD,
    NOT_A_NUMBER,
    NOT_JSON,
    RETAINED_TOO_OLD,
    TOO_LARGE,
    TOPIC_MISMATCH,
    WRONG_SHAPE,
    WRONG_TYPE,
    DecodeError,
    Decoder,
    TopicMatcher,
    quality_code,
    strict_iso_times,
)
from streamguard.service_config import TopicTemplate
from streamguard.timestamps import parse_iso
from streamguard.types import BAD, GOOD, UNCERTAIN

NOW = 1_800_000_000 * 10**9  # 2027-01-15T08:00:00Z, the receive time used below
SECOND = 10**9


def decoder(**payload: object) -> Decoder:
    config = parse_config({"source": {
        "mqtt": {"topics": [{"template": "plant/{area}/{tag}"}, {"template": "gw/{site}", "tag": "{site}.{tag}"},
                            {"template": "raw/{unit}/{tag}", "tag": "{unit}-{tag}"}]},
        "payload": payload}})  # fmt: skip
    assert config.source is not None
    return Decoder(config.source.payload, config.source.mqtt.topics)


def one(d: Decoder, topic: str, payload: object, retained: bool = False) -> tuple[list[str], np.ndarray, np.ndarray,
                                                                                    np.ndarray]:  # fmt: skip
    data = payload if isinstance(payload, bytes) else json.dumps(payload).encode()
    result = d.decode_one(topic, data, NOW, retained)
    return [result.names[c] for c in result.codes], result.ts, result.value, result.quality


def reason(d: Decoder, topic: str, payload: object, retained: bool = False) -> str:
    data = payload if isinstance(payload, bytes) else json.dumps(payload).encode()
    with pytest.raises(DecodeError) as caught:
        d.decode_one(topic, data, NOW, retained)
    return caught.value.reason


# ---------------------------------------------------------------------------------------------------
# forms that are accepted


def test_object_per_sample_with_iso_time_quality_and_the_tag_from_the_topic() -> None:
    names, ts, value, quality = one(decoder(), "plant/100/FT-101",
                                    {"timestamp": "2026-03-02T00:00:01.25Z", "value": 182.4, "quality": "uncertain"})
    assert names == ["FT-101"]
    assert ts.tolist() == [1_772_409_601_250_000_000]
    assert value.tolist() == [182.4] and quality.tolist() == [UNCERTAIN]


def test_tag_expression_combines_segments() -> None:
    names, *_ = one(decoder(), "raw/U7/TT-1", {"timestamp": "2026-03-02T00:00:00Z", "value": 1})
    assert names == ["U7-TT-1"]


def test_list_and_object_holding_a_list_keep_order_and_per_sample_quality() -> None:
    samples = [{"timestamp": f"2026-03-02T00:00:0{i}Z", "value": i, "quality": q}
               for i, q in enumerate(["good", "bad", "uncertain"])]  # fmt: skip
    for payload in (samples, {"samples": samples}):
        names, ts, value, quality = one(decoder(), "plant/a/X", payload)
        assert names == ["X"] * 3
        assert (np.diff(ts) == SECOND).all()
        assert value.tolist() == [0.0, 1.0, 2.0]
        assert quality.tolist() == [GOOD, BAD, UNCERTAIN]


def test_gateway_batch_names_each_sample_when_the_template_has_no_tag_segment() -> None:
    payload = [{"tag": "A", "timestamp": 1_772_409_600_000, "value": 1.0},
               {"tag": "B", "timestamp": 1_772_409_601_000, "value": 2.0}]  # fmt: skip
    names, ts, value, _ = one(decoder(), "gw/s1", payload)
    assert names == ["s1.A", "s1.B"]
    assert ts.tolist() == [1_772_409_600 * SECOND, 1_772_409_601 * SECOND]  # epoch ms by magnitude (auto)


def test_epoch_seconds_and_milliseconds_by_magnitude_and_by_setting() -> None:
    d = decoder()
    assert one(d, "plant/a/X", {"timestamp": 1_772_409_600.5, "value": 1})[1].tolist() == [1_772_409_600_500_000_000]
    assert one(d, "plant/a/X", {"timestamp": 1_772_409_600_500, "value": 1})[1].tolist() == [1_772_409_600_500_000_000]
    ms = decoder(timestamp_format="epoch_ms")
    assert one(ms, "plant/a/X", {"timestamp": 1_772_409_600_500, "value": 1})[1].tolist() == [1_772_409_600_500_000_000]
    assert reason(ms, "plant/a/X", {"timestamp": "2026-03-02T00:00:00Z", "value": 1}) == BAD_TIMESTAMP
    iso = decoder(timestamp_format="iso")
    assert reason(iso, "plant/a/X", {"timestamp": 1_772_409_600, "value": 1}) == BAD_TIMESTAMP


def test_bare_number_takes_the_receive_time_and_is_marked() -> None:
    d = decoder(format="number")
    result = d.decode_one("plant/a/X", b" 12.5 ", NOW)
    assert result.ts.tolist() == [NOW] and result.value.tolist() == [12.5]
    assert result.clock_stamped == {"X"}
    assert reason(d, "plant/a/X", b"twelve") == NOT_A_NUMBER
    assert reason(d, "plant/a/X", b"1.0", retained=True) == RETAINED_TOO_OLD  # no time to judge its age


def test_nan_and_infinity_reach_the_gate_as_in_replay() -> None:
    """The quality gate counts them as not_finite, exactly as for the same values read from a file."""
    _, _, value, _ = one(decoder(), "plant/a/X", b'[{"timestamp":"2026-03-02T00:00:00Z","value":NaN},'
                                                 b'{"timestamp":"2026-03-02T00:00:01Z","value":-Infinity}]')
    assert math.isnan(value[0]) and value[1] == -math.inf


def test_custom_keys() -> None:
    d = decoder(keys={"timestamp": "t", "value": "v", "quality": "q", "samples": "data"})
    names, ts, value, quality = one(d, "plant/a/X", {"data": [{"t": "2026-03-02T00:00:00Z", "v": 3, "q": "bad"}]})
    assert value.tolist() == [3.0] and quality.tolist() == [BAD]


def test_quality_encodings_follow_the_historian_reader() -> None:
    # OPC 10000-4 (Part 4, StatusCode): severity bits 31..30; OPC DA quality byte QQSSSSLL.
    assert quality_code(0x00000000, "opcua") == GOOD
    assert quality_code(0x40000000, "opcua") == UNCERTAIN
    assert quality_code(0x80320000, "opcua") == BAD
    assert quality_code("0x80000000", "opcua") == BAD
    assert quality_code(192, "opc_classic") == GOOD
    assert quality_code(0x40, "opc_classic") == UNCERTAIN
    assert quality_code(0, "opc_classic") == BAD
    assert quality_code(True, "auto") == GOOD and quality_code(False, "opcua") == BAD
    assert quality_code(0, "auto") == 255  # integers are ambiguous without an encoding
    assert quality_code("GOOD", "word") == GOOD and quality_code("1", "bool") == GOOD


# ---------------------------------------------------------------------------------------------------
# refusals: each by its reason, the rest of the message kept


@pytest.mark.parametrize(("topic", "payload", "expected"), [
    ("plant/a/X", b"{not json", NOT_JSON),
    ("plant/a/X", b"\xff\xfe\x00", NOT_JSON),
    ("plant/a/X", b"[" * 100_000, NOT_JSON),
    ("plant/a/X", b'"text"', WRONG_SHAPE),
    ("plant/a/X", b"[]", EMPTY),
    ("plant/a/X", {"value": 1}, MISSING_FIELD),
    ("plant/a/X", {"timestamp": "2026-03-02T00:00:00Z", "value": "1.5"}, WRONG_TYPE),
    ("plant/a/X", {"timestamp": "2026-03-02T00:00:00Z", "value": True}, WRONG_TYPE),
    ("plant/a/X", {"timestamp": "2026-03-02T00:00:00Z", "value": 10**400}, WRONG_TYPE),
    ("plant/a/X", {"timestamp": "2026-02-30T00:00:00Z", "value": 1}, BAD_TIMESTAMP),
    ("plant/a/X", {"timestamp": [1], "value": 1}, BAD_TIMESTAMP),
    ("plant/a/X", {"timestamp": "2026-03-02T00:00:00Z", "value": 1, "quality": "fine"}, BAD_QUALITY),
    ("plant/a/X", {"timestamp": "2099-01-01T00:00:00Z", "value": 1}, FUTURE_TIMESTAMP),
    ("other/a/X", {"timestamp": "2026-03-02T00:00:00Z", "value": 1}, TOPIC_MISMATCH),
    ("plant/a", {"timestamp": "2026-03-02T00:00:00Z", "value": 1}, TOPIC_MISMATCH),
    ("plant/a/", {"timestamp": "2026-03-02T00:00:00Z", "value": 1}, BAD_TAG_NAME),
    ("gw/s1", [{"tag": "A/+", "timestamp": "2026-03-02T00:00:00Z", "value": 1}], BAD_TAG_NAME),
    ("gw/s1", [{"tag": "T#1", "timestamp": "2026-03-02T00:00:00Z", "value": 1}], BAD_TAG_NAME),
    ("gw/s1", [{"timestamp": "2026-03-02T00:00:00Z", "value": 1}], MISSING_FIELD),
])  # fmt: skip
def test_each_bad_input_is_refused_with_its_reason(topic: str, payload: object, expected: str) -> None:
    assert reason(decoder(), topic, payload) == expected


def test_payload_over_max_bytes() -> None:
    assert reason(decoder(max_bytes=64), "plant/a/X", {"timestamp": "2026-03-02T00:00:00Z", "value": 1,
                                                       "note": "x" * 100}) == TOO_LARGE  # fmt: skip


def test_retained_sample_older_than_the_limit_seeds_nothing() -> None:
    d = decoder(retained_max_age="10m")
    fresh = datetime.fromtimestamp(NOW / 1e9 - 60, UTC).isoformat()
    stale = datetime.fromtimestamp(NOW / 1e9 - 3600, UTC).isoformat()
    assert len(d.decode_one("plant/a/X", json.dumps({"timestamp": fresh, "value": 1}).encode(), NOW, True)) == 1
    assert reason(d, "plant/a/X", {"timestamp": stale, "value": 1}, retained=True) == RETAINED_TOO_OLD
    assert len(d.decode_one("plant/a/X", json.dumps({"timestamp": stale, "value": 1}).encode(), NOW, False)) == 1


def test_bad_samples_in_a_batch_cost_only_themselves() -> None:
    d = decoder()
    good = {"timestamp": "2026-03-02T00:00:00Z", "value": 1.0}
    batch = [good, {"timestamp": "nonsense", "value": 2.0}, {"timestamp": "2026-03-02T00:00:02Z", "value": "x"},
             dict(good, timestamp="2026-03-02T00:00:03Z")]  # fmt: skip
    messages = [("plant/a/X", json.dumps(batch).encode(), NOW, False), ("nowhere", b"1", NOW, False),
                ("plant/a/Y", json.dumps(good).encode(), NOW, False)]  # fmt: skip
    result = d.decode(messages)
    assert [result.names[c] for c in result.codes] == ["X", "X", "Y"]
    assert result.message.tolist() == [0, 0, 2]
    assert result.refused_counts() == {WRONG_TYPE: 1, BAD_TIMESTAMP: 1, TOPIC_MISMATCH: 1}
    assert sorted((r.message, r.reason) for r in result.refusals) == [(0, BAD_TIMESTAMP), (0, WRONG_TYPE),
                                                                       (1, TOPIC_MISMATCH)]  # fmt: skip


# ---------------------------------------------------------------------------------------------------
# timestamps: the compiled parser agrees with pyarrow's (the historian reader's) to the nanosecond

_ZONES = st.sampled_from(["Z", "+00:00", "+01:00", "-05:30", "+0530", "+02", "-11:45", "", "+14:00"])


@st.composite
def iso_text(draw: st.DrawFn) -> str:
    moment = draw(st.datetimes(min_value=datetime(1700, 1, 1), max_value=datetime(2250, 12, 31)))
    digits = draw(st.integers(0, 9))
    fraction = draw(st.integers(0, 10**digits - 1)) if digits else 0
    separator = draw(st.sampled_from(["T", " "]))
    text = moment.strftime(f"%Y-%m-%d{separator}%H:%M:%S")
    if digits:
        text += "." + str(fraction).zfill(digits)
    return text + draw(_ZONES)


@settings(max_examples=300, deadline=None)
@given(st.lists(iso_text(), min_size=1, max_size=40))
def test_strict_iso_parser_equals_pyarrow(texts: list[str]) -> None:
    """Reference: pyarrow's ISO 8601 parser as the historian reader applies it (``timestamps.parse_iso``)."""
    ns, done = strict_iso_times(texts)
    expected, bad = parse_iso(pa.array(texts))
    assert done.all()
    assert not bad.any()
    assert ns.tolist() == expected.tolist()


def test_strict_iso_parser_leaves_the_doubtful_to_pyarrow() -> None:
    texts = ["2026-02-29T00:00:00Z", "2024-02-29T00:00:00Z", "2026-03-02T24:00:00Z", "2026-03-02T00:00:60Z",
             "2026-03-02T00:00:00.1234567890Z", "2026-03-02", "2026-03-02T00:00:00+25:00", "2026-03-02T00:00:00z",
             "9999-01-01T00:00:00Z"]  # fmt: skip
    _, done = strict_iso_times(texts)
    assert done.tolist() == [False, True, False, False, False, False, False, False, False]
    _, done = strict_iso_times(["2024-02-29T00:00:00Z", "２０２６-03-02T00:00:00Z"])  # non-ASCII: all to pyarrow
    assert not done.any()


def test_calendar_arithmetic_against_the_standard_library() -> None:
    # Days from the civil date (H. Hinnant's algorithm) against Python's proleptic Gregorian calendar.
    days = [datetime(1678, 1, 1) + timedelta(days=k) for k in range(0, 212_000, 997)]
    texts = [d.strftime("%Y-%m-%dT%H:%M:%S+01:00") for d in days]
    ns, done = strict_iso_times(texts)
    assert done.all()
    expected = [int((d.replace(tzinfo=timezone(timedelta(hours=1))) - datetime(1970, 1, 1, tzinfo=UTC))
                    .total_seconds()) * SECOND for d in days]  # fmt: skip
    assert ns.tolist() == expected


# ---------------------------------------------------------------------------------------------------
# fuzz: whatever the bytes, only DecodeError comes out, and never the decoder-bug reason


_json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=30),
    lambda inner: st.lists(inner, max_size=5) | st.dictionaries(
        st.sampled_from(["timestamp", "value", "quality", "tag", "samples", "x"]), inner, max_size=5),
    max_leaves=25,
)  # fmt: skip
_topics = st.sampled_from(["plant/a/X", "gw/s1", "raw/u/T", "plant//", "plant/a/X/extra", "#", ""]) | st.text(
    max_size=20)


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(topic=_topics, payload=st.binary(max_size=300), retained=st.booleans(), form=st.sampled_from(["json", "number"]))
def test_fuzz_arbitrary_bytes_only_raise_decode_error(topic: str, payload: bytes, retained: bool, form: str) -> None:
    d = decoder(format=form, max_bytes=200)
    try:
        result = d.decode_one(topic, payload, NOW, retained)
    except DecodeError as error:
        assert error.reason != DECODER_ERROR, error.detail
        return
    assert len(result.ts) == len(result.value) == len(result.quality) == len(result.codes)
    assert all(r.reason != DECODER_ERROR for r in result.refusals)


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(topic=_topics, document=_json_values, retained=st.booleans())
@example(topic="plant/a/X", document={"timestamp": None, "value": 0, "quality": []}, retained=False)  # found once
def test_fuzz_arbitrary_json_only_raises_decode_error(topic: str, document: object, retained: bool) -> None:
    d = decoder()
    payload = json.dumps(document).encode()
    try:
        result = d.decode_one(topic, payload, NOW, retained)
    except DecodeError as error:
        assert error.reason != DECODER_ERROR, error.detail
        return
    assert all(r.reason != DECODER_ERROR for r in result.refusals)
    assert result.codes.max(initial=-1) < len(result.names)


# ---------------------------------------------------------------------------------------------------
# the compiled scanner changes the speed of decoding, never its result


def _same(fast: Decoder, general: Decoder, messages: list[tuple[str, bytes, int, bool]]) -> None:
    a, b = fast.decode(messages), general.decode(messages)
    assert [a.names[c] for c in a.codes] == [b.names[c] for c in b.codes]
    assert a.ts.tolist() == b.ts.tolist()
    assert a.value.tobytes() == b.value.tobytes()  # bit for bit, NaN included
    assert a.quality.tolist() == b.quality.tolist() and a.message.tolist() == b.message.tolist()
    assert [(r.message, r.reason, r.count) for r in a.refusals] == [(r.message, r.reason, r.count) for r in b.refusals]


_numbers = st.one_of(st.integers(-(10**25), 10**25), st.floats(allow_nan=False, allow_infinity=False),
                     st.floats(min_value=-1e6, max_value=1e6).map(lambda x: round(x, 3)))  # fmt: skip
_stamps = st.one_of(iso_text(), st.integers(0, 10**14), st.floats(0, 2e9), st.sampled_from(["", "soon", "2026-13-01"]))
_qualities = st.sampled_from([None, "good", "bad", "uncertain", "GOOD", " bad", "fine", True, False, 0, 192])


_clean_stamps = st.one_of(iso_text().filter(lambda t: t[-1] in "Z0123456789"), st.integers(10**12, 2 * 10**12))


@st.composite
def _sample_text(draw: st.DrawFn) -> str:
    """Mostly clean samples (the scanner's case), some messy ones (handed to the general path)."""
    clean = draw(st.integers(0, 9)) < 8
    fields: list[tuple[str, object]] = []
    if clean or draw(st.booleans()):
        fields.append(("timestamp", draw(_clean_stamps if clean else _stamps)))
    if clean or draw(st.booleans()):
        fields.append(("value", draw(_numbers if clean else st.one_of(_numbers, st.sampled_from(["1.5", None, True])))))
    if draw(st.booleans()):
        fields.append(("quality", draw(st.sampled_from([None, "good", "bad", "uncertain", True, False]) if clean
                                       else _qualities)))  # fmt: skip
    if draw(st.booleans()):
        fields.append(("note", draw(st.one_of(st.text(alphabet="abc xyz", max_size=5), _numbers))))
    if not clean and draw(st.booleans()):
        fields.append(("samples", 3))
    fields = draw(st.permutations(fields))
    space = draw(st.sampled_from(["", " ", "\n  "]))
    pairs = [f"{json.dumps(k)}:{space}{json.dumps(v)}" for k, v in fields]
    return "{" + space + ("," + space).join(pairs) + space + "}"


@st.composite
def _payload(draw: st.DrawFn) -> bytes:
    samples = draw(st.lists(_sample_text(), min_size=0, max_size=4))
    if len(samples) == 1 and draw(st.booleans()):
        text = samples[0]
    else:
        text = "[" + ",".join(samples) + "]"
    if draw(st.integers(0, 12)) == 0:  # damage
        cut = draw(st.integers(0, len(text)))
        text = text[:cut] + draw(st.sampled_from(["", "x", "}", "]", "\\\\", "é", "NaN"])) + text[cut:]
    return text.encode()


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.tuples(st.sampled_from(["plant/a/X", "plant/b/Y", "gw/s1"]), _payload(), st.booleans()),
                min_size=1, max_size=8))  # fmt: skip
def test_scanner_and_general_path_decode_alike(messages: list[tuple[str, bytes, bool]]) -> None:
    fast, general = decoder(), decoder()
    general._scan_keys = None
    _same(fast, general, [(t, p, NOW, r) for t, p, r in messages])


@settings(max_examples=200, deadline=None)
@given(st.lists(st.binary(max_size=120), min_size=1, max_size=5))
def test_scanner_and_general_path_agree_on_arbitrary_bytes(payloads: list[bytes]) -> None:
    fast, general = decoder(), decoder()
    general._scan_keys = None
    _same(fast, general, [("plant/a/X", p, NOW, False) for p in payloads])


def test_scanner_reads_large_gateway_batches_exactly() -> None:
    rng = np.random.default_rng(11)
    values = rng.normal(100.0, 15.0, 500)
    batch = [{"timestamp": f"2026-03-02T00:{i // 60:02d}:{i % 60:02d}.{i:03d}Z", "value": float(v),
              "quality": "good" if i % 7 else "bad"} for i, v in enumerate(values)]  # fmt: skip
    messages = [("plant/a/X", json.dumps(batch[k : k + 100]).encode(), NOW, False) for k in range(0, 500, 100)]
    fast, general = decoder(), decoder()
    general._scan_keys = None
    _same(fast, general, messages)
    handed_back: list[int] = []
    fast._add_safely = lambda columns, index, message: handed_back.append(index)  # type: ignore[method-assign]
    assert fast.decode(messages).value.tolist() == values.tolist()
    assert handed_back == []  # all read by the scanner


_TEMPLATE_SETS = [["plant/{area}/{unit}/{tag}"], ["gw/{site}/{tag}", "plant/{tag}"], ["a/{tag}/b"], ["{tag}"],
                  ["x/{tag}", "x/{other}/{tag}"]]  # fmt: skip
_WORDS = ["plant", "gw", "a", "b", "x", "FT-1", "T+", "#", "", "s1", "u", "\u00e9", "\x07"]


def _answer(call: Any, topic: str) -> tuple[str, object]:
    try:
        return "tag", call(topic)
    except DecodeError as error:
        return "refused", error.reason


@pytest.mark.parametrize("templates", _TEMPLATE_SETS, ids="|".join)
def test_direct_topic_reading_answers_exactly_as_the_general_matcher(templates: list[str]) -> None:
    """Templates whose tag is one segment are read without the topic cache; on random topics (fixed seed)
    the answer, tag or refusal reason, equals the general template matcher's (which the cache keeps)."""
    matcher = TopicMatcher([TopicTemplate(template=t) for t in templates])
    assert matcher._direct is not None
    rng = np.random.default_rng(11)
    for _ in range(3000):
        topic = "/".join(_WORDS[i] for i in rng.integers(0, len(_WORDS), int(rng.integers(1, 6))))
        assert _answer(matcher.tag_of, topic) == _answer(matcher._resolve, topic), topic
    assert not matcher._cache  # nothing held per topic


def test_a_composed_tag_name_uses_the_cached_general_matcher() -> None:
    matcher = TopicMatcher([TopicTemplate(template="p/{area}/{tag}", tag="{area}.{tag}")])
    assert matcher._direct is None
    assert matcher.tag_of("p/north/FT-1") == "north.FT-1"
    assert matcher._cache == {"p/north/FT-1": "north.FT-1"}
