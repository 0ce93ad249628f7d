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
# The classic OPC quality by low byte: below 64 bad, 64..191 uncertain, 192 and up good.
_CLASSIC_LEVELS = np.repeat(np.array([BAD, UNCERTAIN, GOOD], dtype=np.uint8), [64, 128, 64])


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
    if _is_text(array.type):
        array = pc.dictionary_encode(array)
    if pa.types.is_dictionary(array.type):
        dictionary = array.dictionary
        if _is_text(dictionary.type):
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
    if pa.types.is_integer(array.type):
        filled = pc.fill_null(array, 0) if array.null_count else array
        return decode_integers(np.asarray(filled.to_numpy(zero_copy_only=False)), encoding)
    numbers = np.asarray(pc.fill_null(array.cast(pa.float64()), np.nan).to_numpy(zero_copy_only=False))
    whole = np.isfinite(numbers) & (numbers == np.round(np.nan_to_num(numbers)))
    whole &= np.abs(numbers) < 2.0**62
    decoded = decode_integers(np.where(whole, numbers, 0).astype(np.int64), encoding)
    decoded[~whole] = INVALID
    return decoded


def decode_integers(numbers: np.ndarray, encoding: str) -> np.ndarray:
    """Integer codes (any numpy integer type) to levels; codes outside the encoding's range are INVALID.

    Works in the column's own integer type where it can, so a 32-bit column costs no widened copy.
    """
    if encoding == "opcua":
        if numbers.dtype in (np.dtype(np.int32), np.dtype(np.uint32)):
            # A signed 32-bit column holds the same bits as the UInt32 StatusCode.
            return _OPCUA_SEVERITY[numbers.view(np.uint32) >> 30]
        wide = numbers.astype(np.int64)
        decoded = _OPCUA_SEVERITY[((wide & 0xFFFFFFFF) >> 30)]
        valid = (wide >= -(2**31)) & (wide < 2**32)
    elif encoding == "opc_classic":
        decoded = _CLASSIC_LEVELS[numbers & 0xFF]
        valid = numbers <= 0xFFFF
        if numbers.dtype.kind == "i":
            valid &= numbers >= 0
    elif encoding == "bool":
        decoded = np.where(numbers == 1, GOOD, BAD).astype(np.uint8)
        valid = (numbers == 0) | (numbers == 1)
    else:
        raise ValueError(f"no integer codes in the {encoding} encoding")
    if not valid.all():
        decoded[~valid] = INVALID
    return decoded


def _is_text(kind: pa.DataType) -> bool:
    # Binary too: the file reader keeps text columns as bytes so that a file not in UTF-8 still reads.
    return bool(
        pa.types.is_string(kind)
        or pa.types.is_large_string(kind)
        or pa.types.is_binary(kind)
        or pa.types.is_large_binary(kind)
    )


def _decode_text(text: str | bytes | None, encoding: str, where: str) -> np.uint8:
    """One distinct quality text to its level; called once per dictionary entry, not per row."""
    if text is None:
        return INVALID
    if isinstance(text, bytes):
        text = text.decode("latin-1")  # the codes are ASCII; anything else is INVALID anyway
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
    if number is None or not -(2**62) < number < 2**62:
        return INVALID
    return np.uint8(decode_integers(np.array([number], dtype=np.int64), encoding)[0])


def _parse_integer(word: str) -> int | None:
    try:
        return int(word, 16) if word.startswith(("0x", "-0x")) else int(word, 10)
    except ValueError:
        return None


def _decode_dictionary_text(dictionary: pa.Array, encoding: str, where: str) -> np.ndarray:
    return np.array([_decode_text(text, encoding, where) for text in dictionary.to_pylist()], dtype=np.uint8)
