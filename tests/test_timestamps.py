"""Timestamp parsing checked against Python's own ISO 8601 reader (datetime.fromisoformat, RFC 3339 offsets)."""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np
import pyarrow as pa
import pytest

from streamguard import timestamps
from streamguard.errors import InputError


def reference_ns(text: str) -> int:
    """Nanoseconds since the epoch by the standard library; a naive time is read as UTC, as the reader does."""
    moment = datetime.fromisoformat(text)
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    delta = moment - datetime(1970, 1, 1, tzinfo=UTC)
    return (delta.days * 86_400 + delta.seconds) * 1_000_000_000 + delta.microseconds * 1_000


ISO_SAMPLES = [
    "2024-03-01T02:00:00+02:00",
    "2024-03-01T00:00:00Z",
    "2024-02-29T19:00:00-05:00",
    "2024-03-01T05:30:00+05:30",
    "2024-03-01T05:30:00+0530",
    "2024-03-01T00:00:00.5Z",
    "2024-03-01T00:00:00.123456+01:00",
    "2024-03-01T00:00:00",
    "2024-03-01 00:00:00",
    "2024-10-27T02:30:00+01:00",
]


@pytest.mark.parametrize("text", ISO_SAMPLES)
def test_iso_matches_the_standard_library(text: str) -> None:
    """Offsets, Z, fractions and naive (UTC) times land on the instant Python's datetime computes."""
    ns, bad = timestamps.parse_iso(pa.array([text]))
    assert not bad[0]
    assert int(ns[0]) == reference_ns(text)


def test_iso_keeps_nanoseconds() -> None:
    """Nine fractional digits survive exactly (datetime stops at microseconds, so the reference adds 789 ns)."""
    ns, bad = timestamps.parse_iso(pa.array(["2024-03-01T00:00:00.123456789Z"]))
    assert not bad[0]
    assert int(ns[0]) == reference_ns("2024-03-01T00:00:00.123456Z") + 789


def test_mixed_offsets_and_bad_cells_are_found_in_one_pass() -> None:
    """A column mixing offset and naive times parses both; impossible dates and junk are marked bad."""
    text = pa.array(
        [
            "2024-03-01T00:00:00Z",
            "2024-03-01T01:00:00",
            "2024-02-30T00:00:00Z",
            "yesterday",
            "",
            None,
            "2024-03-01T03:00:00+01:00",
            "2024-03-01T25:00:00",
        ]
    )
    ns, bad = timestamps.parse_iso(text)
    assert bad.tolist() == [False, False, True, True, True, True, False, True]
    expected = [
        reference_ns("2024-03-01T00:00:00Z"),
        reference_ns("2024-03-01T01:00:00"),
        reference_ns("2024-03-01T03:00:00+01:00"),
    ]
    assert ns[~bad].tolist() == expected


def test_bad_cells_are_located_among_many() -> None:
    """The halving search finds exactly the bad cells, wherever they are (fixed seed 7)."""
    rng = np.random.default_rng(7)
    count = 5000
    good = np.datetime_as_string(np.datetime64("2024-01-01T00:00:00", "s") + np.arange(count), unit="s")
    text = np.char.add(good.astype(str), "Z").astype(object)
    bad_positions = rng.choice(count, size=37, replace=False)
    text[bad_positions[:20]] = "2024-13-01T00:00:00Z"  # passes the cheap screen, fails the cast
    text[bad_positions[20:]] = "n/a"  # stopped by the screen
    ns, bad = timestamps.parse_iso(pa.array(text.tolist()))
    assert set(np.flatnonzero(bad).tolist()) == set(bad_positions.tolist())
    first = reference_ns("2024-01-01T00:00:00Z")
    clean = np.setdiff1d(np.arange(count), bad_positions)
    assert np.array_equal(ns[clean], first + clean.astype(np.int64) * 1_000_000_000)


def test_epoch_conversion_is_exact_for_whole_units() -> None:
    """Whole milliseconds near today (beyond 2**53 ns) convert without float rounding."""
    milliseconds = np.array([1_709_251_200_123.0, 1_709_251_200_999.0])
    ns, bad = timestamps.epoch_to_ns(milliseconds, "epoch_ms")
    assert ns.tolist() == [1_709_251_200_123_000_000, 1_709_251_200_999_000_000]
    assert not bad.any()
    seconds = np.array([1_709_251_200.0, 1_709_251_200.25, -1.5])
    ns, bad = timestamps.epoch_to_ns(seconds, "epoch_s")
    assert ns.tolist() == [1_709_251_200_000_000_000, 1_709_251_200_250_000_000, -1_500_000_000]


def test_epoch_unit_by_magnitude() -> None:
    """Below 1e11 seconds, below 1e14 milliseconds (common practice), beyond that an error naming the file."""
    assert timestamps.epoch_unit_for(1.7e9, "f") == "epoch_s"
    assert timestamps.epoch_unit_for(1.7e12, "f") == "epoch_ms"
    with pytest.raises(InputError, match=r"^data/x\.csv: .*input\.timestamp_format"):
        timestamps.epoch_unit_for(1.7e18, "data/x.csv")


def test_checked_range_marks_values_that_do_not_fit_the_unit() -> None:
    """Under auto, a millisecond count in a seconds file is bad rather than a date in the year 55000."""
    ns, bad = timestamps.epoch_to_ns(np.array([1.7e9, 1.7e12, np.nan]), "epoch_s", checked_range=True)
    assert bad.tolist() == [False, True, True]


def test_detect_kind() -> None:
    """Numbers are epochs by magnitude; ISO text is typed by whether most values carry an offset."""
    assert timestamps.detect_kind(pa.array(["1709251200", "1709251201.5"]), "auto", "f") == "epoch_s"
    assert timestamps.detect_kind(pa.array(["1709251200000", ""]), "auto", "f") == "epoch_ms"
    assert timestamps.detect_kind(pa.array(["1709251200", "n/a", "1709251201"]), "auto", "f") == "epoch_s"
    assert timestamps.detect_kind(pa.array(["2024-03-01T00:00:00Z"]), "auto", "f") == timestamps.ISO_WITH_OFFSET
    assert timestamps.detect_kind(pa.array(["2024-03-01T00:00:00"]), "iso", "f") == timestamps.ISO_NAIVE
    assert timestamps.detect_kind(pa.array(["2024-03-01"]), "auto", "f") == timestamps.ISO_NAIVE
    assert timestamps.detect_kind(pa.array(["1709251200"]), "epoch_ms", "f") == "epoch_ms"


def test_parse_numbers() -> None:
    """NaN and inf are numbers (the quality gate counts them); empty is missing; junk and padding are bad."""
    values, missing, bad = timestamps.parse_numbers(pa.array(["1.5", "-2e3", "NaN", "inf", "", None, "abc", " 1"]))
    assert missing.tolist() == [False, False, False, False, True, True, False, False]
    assert bad.tolist() == [False, False, False, False, False, False, True, True]
    assert values[:2].tolist() == [1.5, -2000.0]
    assert np.isnan(values[2]) and np.isposinf(values[3])
