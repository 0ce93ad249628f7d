"""Quality decoding checked against the published code tables of OPC UA and classic OPC DA."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

from streamguard.errors import InputError
from streamguard.quality import INVALID, decode_quality
from streamguard.types import BAD, GOOD, UNCERTAIN

# OPC UA StatusCodes with their numeric values as published by the OPC Foundation
# (UA-Nodeset, Schema/StatusCode.csv; names and values also listed in OPC 10000-4 Part 4 and
# OPC 10000-8 Part 8). Severity is bits 31..30 per OPC 10000-4 Part 4, StatusCode: 00 Good,
# 01 Uncertain, 10 Bad.
OPCUA_CODES = [
    ("Good", 0x00000000, GOOD),
    ("GoodClamped", 0x00300000, GOOD),
    ("GoodLocalOverride", 0x00960000, GOOD),
    ("GoodCascade", 0x04090000, GOOD),
    ("Uncertain", 0x40000000, UNCERTAIN),
    ("UncertainLastUsableValue", 0x40900000, UNCERTAIN),
    ("UncertainSensorNotAccurate", 0x40930000, UNCERTAIN),
    ("UncertainSimulatedValue", 0x42090000, UNCERTAIN),
    ("Bad", 0x80000000, BAD),
    ("BadNoCommunication", 0x80310000, BAD),
    ("BadSensorFailure", 0x808C0000, BAD),
    ("BadOutOfService", 0x808D0000, BAD),
]

# Classic OPC DA quality byte, QQSSSSLL (OPC DA specification, opc_da.h constants OPC_QUALITY_*):
# GOOD 0xC0, LOCAL_OVERRIDE 0xD8, UNCERTAIN 0x40, LAST_USABLE 0x44, SENSOR_CAL 0x50, SUB_NORMAL 0x58,
# BAD 0x00, CONFIG_ERROR 0x04, COMM_FAILURE 0x18, OUT_OF_SERVICE 0x1C. Limit bits LL (low two) do
# not change the quality: 0xC1 is good, limited low.
OPC_CLASSIC_CODES = [
    ("GOOD", 0xC0, GOOD),
    ("GOOD limited low", 0xC1, GOOD),
    ("LOCAL_OVERRIDE", 0xD8, GOOD),
    ("UNCERTAIN", 0x40, UNCERTAIN),
    ("LAST_USABLE", 0x44, UNCERTAIN),
    ("SENSOR_CAL", 0x50, UNCERTAIN),
    ("SUB_NORMAL", 0x58, UNCERTAIN),
    ("BAD", 0x00, BAD),
    ("CONFIG_ERROR", 0x04, BAD),
    ("COMM_FAILURE", 0x18, BAD),
    ("OUT_OF_SERVICE", 0x1C, BAD),
]


@pytest.mark.parametrize(("name", "code", "level"), OPCUA_CODES)
def test_opcua_status_codes_decode_by_severity_bits(name: str, code: int, level: np.uint8) -> None:
    """Each published OPC UA StatusCode decodes to the level its severity bits name."""
    as_integer = decode_quality(pa.array([code], pa.uint32()), "opcua", "f.csv")
    as_hex_text = decode_quality(pa.array([f"0x{code:08X}"]), "opcua", "f.csv")
    as_decimal_text = decode_quality(pa.array([str(code)]), "opcua", "f.csv")
    assert as_integer.tolist() == as_hex_text.tolist() == as_decimal_text.tolist() == [level], name


def test_opcua_reserved_severity_and_signed_storage() -> None:
    """Severity 11 (reserved in Part 4) reads as bad; a code stored in a signed int32 keeps its bits."""
    signed_bad_no_communication = 0x80310000 - 2**32  # -2144272384, as a database int32 column holds it
    decoded = decode_quality(pa.array([0xC0000000, signed_bad_no_communication], pa.int64()), "opcua", "f")
    assert decoded.tolist() == [BAD, BAD]


@pytest.mark.parametrize(("name", "code", "level"), OPC_CLASSIC_CODES)
def test_classic_opc_quality_byte(name: str, code: int, level: np.uint8) -> None:
    """Each OPC DA quality constant decodes to the quality its QQ bits name."""
    assert decode_quality(np.array([code]), "opc_classic", "f").tolist() == [level], name


def test_classic_opc_thresholds_and_vendor_byte() -> None:
    """The stated thresholds hold at their edges; the vendor high byte of the 16-bit word is ignored."""
    codes = np.array([63, 64, 191, 192, 255, 0x12C0, 0x1200, 256 * 256, -1])
    expected = [BAD, UNCERTAIN, UNCERTAIN, GOOD, GOOD, GOOD, BAD, INVALID, INVALID]
    assert decode_quality(codes, "opc_classic", "f").tolist() == expected


def test_integers_under_auto_are_refused_with_the_fix() -> None:
    """0 is Good in OPC UA and Bad in classic OPC, so auto must not guess."""
    for column in (pa.array([0, 192], pa.int32()), pa.array(["0", "192"]), pa.array(["0x80000000"])):
        with pytest.raises(InputError, match=r"^data/day\.csv: .*input\.quality_encoding to opcua or opc_classic"):
            decode_quality(column, "auto", "data/day.csv")


def test_booleans() -> None:
    """true is good and false bad, as booleans or as text; 1/0 only under an explicit bool encoding."""
    assert decode_quality(pa.array([True, False, None]), "auto", "f").tolist() == [GOOD, BAD, INVALID]
    text = pa.array(["true", "FALSE", " True ", "1", "0", "yes"])
    assert decode_quality(text, "bool", "f").tolist() == [GOOD, BAD, GOOD, GOOD, BAD, INVALID]
    assert decode_quality(pa.array(["true", "false"]), "auto", "f").tolist() == [GOOD, BAD]


def test_words_any_case_and_unknown_words() -> None:
    """good/uncertain/bad in any case; other words come back INVALID for the reader to count."""
    text = pa.array(["good", "GOOD", "Uncertain", "bad", "questionable", "", None])
    expected = [GOOD, GOOD, UNCERTAIN, BAD, INVALID, INVALID, INVALID]
    assert decode_quality(text, "word", "f").tolist() == expected
    assert decode_quality(text, "auto", "f").tolist() == expected


def test_dictionary_column_decodes_each_distinct_value_once() -> None:
    """A dictionary-encoded column (as the CSV reader produces) gives the same result as plain text."""
    plain = pa.array(["good", "bad", "good", None, "uncertain", "bad"])
    encoded = plain.dictionary_encode()
    assert decode_quality(encoded, "word", "f").tolist() == decode_quality(plain, "word", "f").tolist()


def test_numbers_under_word_encoding_are_a_configuration_mismatch() -> None:
    """Integers cannot be words; the message names the setting to change."""
    with pytest.raises(InputError, match="quality_encoding is word"):
        decode_quality(pa.array([192]), "word", "f")


def test_non_integral_numbers_are_invalid() -> None:
    """A code of 192.5 or NaN is not a quality code."""
    decoded = decode_quality(np.array([192.0, 192.5, np.nan]), "opc_classic", "f")
    assert decoded.tolist() == [GOOD, INVALID, INVALID]
