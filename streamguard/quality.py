"""Quality codes as historians and OPC servers write them, decoded to the pipeline's three levels.

Sources hand their raw quality column here and get GOOD / UNCERTAIN / BAD (``streamguard.types``) back,
one uint8 per sample; the quality gate decides what each level means for detection. A code that fits
no encoding comes back as ``INVALID`` so the reader can skip the row and count it.

Encodings (``input.quality_encoding``):

``opcua``
    OPC UA StatusCode, a UInt32 whose two top bits are the severity (OPC 10000-4, Part 4 Services,
    StatusCode): 00 Good, 01 Uncertain, 10 Bad, 11 reserved and read as Bad. Decimal or ``0x`` hex text;
    a negative number is taken as the same 32 bits stored in a signed integer.
``opc_classic``
    The OPC DA quality word, whose low byte is QQSSSSLL with QQ 11 good, 01 uncertain, 00 bad (OPC DA
    specification, Quality flags). QQ 10 is not used by OPC DA; it is read as uncertain rather than
    trusted, so: low byte >= 192 good, 64..191 uncertain, < 64 bad. The high byte is vendor-specific
    and ignored.
``bool``
    true/1 good, false/0 bad.
``word``
    good / uncertain / bad, any case.
``auto``
    Words and booleans are recognised. Integers are refused: OPC UA Good is 0, which the classic byte
    reads as Bad, so guessing would invert the data.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from streamguard.errors import InputError
from streamguard.types import BAD, GOOD, UNCERTAIN

QUALITY_ENCODINGS = ("auto", "opcua", "opc_classic", "bool", "word")
INVALID = np.uint8(255)

_WORDS = {"good": GOOD, "uncertain": UNCERTAIN, "bad": BAD}
_BOOLEAN_WORDS = {"true": GOOD, "false": BAD}
_BOOLEAN_DIGITS = {"1": GOOD, "0": BAD}
# Severity bits 31..30 of an OPC UA StatusCode, indexed by their value.
_OPCUA_SEVERITY = np.array([GOOD, UNCERTAIN, BAD, BAD], dtype=np.uint8)


def ambiguous_integers_message(where: str) -> str:
    return (
        f"{where}: quality codes are integers, which read differently as OPC UA status codes (0 is Good) "
        "and as classic OPC quality (0 is Bad); set input.quality_encoding to opcua or opc_classic"
    )


def decode_quality(values: Any, encoding: str, where: str) -> np.ndarray:
    """Decode a quality column (pyarrow array of any type, or numpy) to uint8 GOOD/UNCERTAIN/BAD/INVALID.

    Dictionary-encoded text is decoded once per distinct value, so a column of millions of repeated
    codes costs one lookup per row. ``where`` (a path) starts any error message.
    """
    if encoding not in QUALITY_ENCODINGS:
        raise InputError(f"{where}: unknown quality encoding {encoding!r}; use one of {', '.join(QUALITY_ENCODINGS)}")
    array = values.combine_chunks() if isinstance(values, pa.ChunkedArray) else values
    if not isinstance(array, pa.Array):
        array = pa.array(np.asarray(array))
    if pa.types.is_string(array.type) or pa.types.is_large_string(array.type):
        array = pc.dictionary_encode(array)
    if pa.types.is_dictionary(array.type):
        dictionary = array.dictionary
        if pa.types.is_string(dictionary.type) or pa.types.is_large_string(dictionary.type):
            table = _decode_dictionary_text(dictionary, encoding, where)
        else:
            table = decode_quality(dictionary, encoding, where)
        indices = pc.fill_null(array.indices, 0) if array.null_count else array.indices
        positions = np.asarray(indices.to_numpy(zero_copy_only=False))
        decoded = table[positions] if len(table) else np.full(len(array), INVALID, dtype=np.uint8)
        if array.null_count:
            decoded[array.is_null().to_numpy(zero_copy_only=False)] = INVALID
        return decoded
    if pa.types.is_boolean(array.type):
        decoded = _decode_booleans(array, encoding, where)
    elif pa.types.is_integer(array.type) or pa.types.is_floating(array.type):
        decoded = _decode_numbers(array, encoding, where)
    else:
        raise InputError(f"{where}: a quality column of type {array.type} cannot be decoded")
    if array.null_count:
        decoded[array.is_null().to_numpy(zero_copy_only=False)] = INVALID
    return decoded


def _decode_booleans(array: pa.Array, encoding: str, where: str) -> np.ndarray:
    if encoding not in ("auto", "bool"):
        raise InputError(f"{where}: the quality column holds booleans, but input.quality_encoding is {encoding}")
    truth = np.asarray(pc.fill_null(array, False).to_numpy(zero_copy_only=False), dtype=bool)
    return np.where(truth, GOOD, BAD).astype(np.uint8)


def _decode_numbers(array: pa.Array, encoding: str, where: str) -> np.ndarray:
    if encoding == "auto":
        raise InputError(ambiguous_integers_message(where))
    if encoding == "word":
        raise InputError(f"{where}: the quality column holds numbers, but input.quality_encoding is word")
    numbers = np.asarray(pc.fill_null(array.cast(pa.float64()), np.nan).to_numpy(zero_copy_only=False))
    return decode_integers(numbers, encoding)


def decode_integers(numbers: np.ndarray, encoding: str) -> np.ndarray:
    """Integer codes (held as float64 so NaN can mark a gap) to levels; non-integers are INVALID."""
    decoded = np.full(numbers.shape, INVALID, dtype=np.uint8)
    whole = np.isfinite(numbers) & (numbers == np.floor(np.nan_to_num(numbers)))
    if encoding == "opcua":
        valid = whole & (numbers >= -(2.0**31)) & (numbers < 2.0**32)
        bits = np.where(valid, numbers, 0).astype(np.int64) & 0xFFFFFFFF
        decoded[valid] = _OPCUA_SEVERITY[(bits[valid] >> 30) & 3]
    elif encoding == "opc_classic":
        valid = whole & (numbers >= 0) & (numbers <= 0xFFFF)
        low_byte = np.where(valid, numbers, 0).astype(np.int64) & 0xFF
        levels = np.where(low_byte >= 192, GOOD, np.where(low_byte >= 64, UNCERTAIN, BAD)).astype(np.uint8)
        decoded[valid] = levels[valid]
    elif encoding == "bool":
        decoded[whole & (numbers == 1)] = GOOD
        decoded[whole & (numbers == 0)] = BAD
    return decoded


def _decode_text(text: str | None, encoding: str, where: str) -> np.uint8:
    """One distinct quality text to its level; called once per dictionary entry, not per row."""
    if text is None:
        return INVALID
    word = text.strip().lower()
    if encoding == "word":
        return _WORDS.get(word, INVALID)
    if encoding == "bool":
        return _BOOLEAN_WORDS.get(word, _BOOLEAN_DIGITS.get(word, INVALID))
    number = _parse_integer(word)
    if encoding == "auto":
        if number is not None:
            raise InputError(ambiguous_integers_message(where))
        return _WORDS.get(word, _BOOLEAN_WORDS.get(word, INVALID))
    if number is None:
        return INVALID
    return np.uint8(decode_integers(np.array([float(number)]), encoding)[0])


def _parse_integer(word: str) -> int | None:
    try:
        return int(word, 16) if word.startswith(("0x", "-0x")) else int(word, 10)
    except ValueError:
        return None


def _decode_dictionary_text(dictionary: pa.Array, encoding: str, where: str) -> np.ndarray:
    return np.array([_decode_text(text, encoding, where) for text in dictionary.to_pylist()], dtype=np.uint8)
