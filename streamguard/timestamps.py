"""Historian timestamps made into int64 nanoseconds UTC, and the tolerant casts that find bad cells.

Used by the historian file reader (``sources/historian.py``). Its fast path lets pyarrow's CSV parser
convert timestamps directly; this module serves the slow path, when a piece of a file holds cells that
do not parse and the reader must find which ones, and the format detection done once per file.

Accepted forms: ISO 8601 with a UTC offset (``+02:00``, ``+0200``, ``+02``) or ``Z``, with or without
fractional seconds (up to nanoseconds), ``T`` or a space between date and time; ISO 8601 without an
offset, which is taken as UTC (historians that export local time without an offset must be converted
before reading, since a local clock repeats an hour every autumn); epoch seconds or milliseconds, whole
or fractional.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from streamguard.epochs import (  # noqa: F401  (re-exported: the reader's names for them)
    EPOCH_MILLISECONDS_BELOW,
    EPOCH_SECONDS_BELOW,
    NS_PER_UNIT,
    TIMESTAMP_FORMATS,
    epoch_to_ns,
    epoch_unit_for,
    epoch_unit_of,
)
from streamguard.errors import InputError

# The kinds of timestamp column the reader distinguishes; ISO text splits in two because pyarrow's
# typed parser needs to know in advance whether values carry an offset.
ISO_WITH_OFFSET = "iso_offset"
ISO_NAIVE = "iso_naive"

_UTC_NS = pa.timestamp("ns", tz="UTC")
_NAIVE_NS = pa.timestamp("ns")

# Screens run before the exact casts, so a column full of junk does not fall to the halving search.
# Each accepts a little more than pyarrow's parser does (that rest is found by the search), never less.
_ISO_SCREEN = r"^\d{4}-\d{2}-\d{2}([T ]\d{2}(:?\d{2}(:?\d{2}([.,]\d+)?)?)?)?(Z|[+-]\d{2}(:?\d{2})?)?$"
NUMBER_SCREEN = r"^[+-]?((\d+\.?\d*|\.\d+)([eE][+-]?\d+)?|(?i:nan|inf|infinity))$"


def cast_marking_failures(text: pa.Array, target: pa.DataType, screen: str | None) -> tuple[np.ndarray, np.ndarray]:
    """Cast ``text`` cell by cell to ``target``; return (values as numpy, failed mask).

    pyarrow's cast stops at the first bad cell without saying which; this finds them all by casting
    halves of a failing range until each bad cell stands alone, so the work grows with the number of bad
    cells times log(n), and a clean range costs one vectorised cast. Null cells are neither values nor
    failures; the caller reads them from ``text.is_null()``. Timestamps come back as int64 nanoseconds.
    """
    count = len(text)
    numpy_type = np.dtype(np.float64) if pa.types.is_floating(target) else np.dtype(np.int64)
    failed = np.zeros(count, dtype=bool)
    try:  # the usual case: the bad cells are in another column
        return _to_numpy(pc.cast(text, target), numpy_type), failed
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        pass
    values = np.zeros(count, dtype=numpy_type)
    if screen is not None:
        passes = pc.fill_null(pc.match_substring_regex(text, screen), True)
        failed |= ~passes.to_numpy(zero_copy_only=False)
        # Screened-out cells become nulls so the casts below skip them.
        text = pc.if_else(passes, text, pa.scalar(None, text.type))
    stack = [(0, count)]
    while stack:
        start, stop = stack.pop()
        segment = text.slice(start, stop - start)
        try:
            converted = pc.cast(segment, target)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            if stop - start == 1:
                failed[start] = True
            else:
                middle = (start + stop) // 2
                stack.extend([(middle, stop), (start, middle)])
            continue
        values[start:stop] = _to_numpy(converted, numpy_type)
    return values, failed


def _to_numpy(array: pa.Array, numpy_type: np.dtype) -> np.ndarray:
    if pa.types.is_timestamp(array.type):
        array = array.view(pa.int64())
    filled = pc.fill_null(array, pa.scalar(0, array.type)) if array.null_count else array
    return np.asarray(filled.to_numpy(zero_copy_only=False), dtype=numpy_type)


def has_offset(text: pa.Array) -> np.ndarray:
    """True where an ISO timestamp carries a zone designator (``Z``, ``+02:00``, ``-0500``, ``+02``).

    A sign after the ten characters of the date can only start an offset; literal searches are used
    because they run several times faster than a regular expression over millions of cells.
    """
    time_of_day = pc.utf8_slice_codeunits(text, 10)
    marked = pc.or_(
        pc.ends_with(text, "Z"),
        pc.or_(pc.match_substring(time_of_day, "+"), pc.match_substring(time_of_day, "-")),
    )
    return np.asarray(pc.fill_null(marked, False).to_numpy(zero_copy_only=False), dtype=bool)


def parse_iso(text: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """ISO 8601 text to (int64 ns UTC, bad mask); empty or null cells count as bad.

    Values with and without an offset may be mixed; those without are taken as UTC.
    """
    text = _as_string(text)
    ns = np.zeros(len(text), dtype=np.int64)
    present = _present(text)
    bad = ~present
    if bad.any():
        text = pc.if_else(pa.array(present), text, pa.scalar(None, text.type))
    for target in (_UTC_NS, _NAIVE_NS):  # most columns are all one or the other, and clean
        try:
            return _to_numpy(pc.cast(text, target), np.dtype(np.int64)), bad
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            pass
    offset = has_offset(text)
    for mask, target in ((offset, _UTC_NS), (~offset, _NAIVE_NS)):
        rows = np.flatnonzero(mask & ~bad)
        if rows.size == 0:
            continue
        part = text.take(pa.array(rows)) if rows.size < len(text) else text
        values, failed = cast_marking_failures(part, target, _ISO_SCREEN)
        ns[rows] = values
        bad[rows[failed]] = True
    return ns, bad


def parse_numbers(text: pa.Array) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Decimal text to (float64, missing mask, bad mask); NaN and inf are numbers, empty cells are missing."""
    text = _as_string(text)
    missing = ~_present(text)
    values, bad = cast_marking_failures(
        pc.if_else(pa.array(missing), pa.scalar(None, text.type), text), pa.float64(), NUMBER_SCREEN
    )
    return values, missing, bad & ~missing


def parse_epoch_text(text: pa.Array, unit: str, *, checked_range: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Epoch numbers written as text to (int64 ns, bad mask); empty cells count as bad."""
    numbers, missing, unparsable = parse_numbers(text)
    ns, out_of_range = epoch_to_ns(numbers, unit, checked_range=checked_range)
    return ns, missing | unparsable | out_of_range


def detect_kind(sample: pa.Array, timestamp_format: str, where: str) -> str:
    """Decide, from a file's first rows, how its timestamp column is written.

    Returns ``iso_offset``, ``iso_naive``, ``epoch_s`` or ``epoch_ms``. ISO columns are typed by the
    majority of the sample; a file mixing both still reads correctly through the slow path.
    """
    if timestamp_format in NS_PER_UNIT:
        return timestamp_format
    text = _as_string(sample)
    present = text.filter(pa.array(_present(text)))
    if timestamp_format == "auto" and len(present) > 0:
        numbers, _, bad = parse_numbers(present)
        if 2 * int(bad.sum()) < len(present):  # mostly numbers: epochs, the odd junk cell aside
            return epoch_unit_of(numbers[~bad], where)
    if timestamp_format not in ("auto", "iso"):
        raise InputError(f"{where}: unknown timestamp format {timestamp_format!r}; use one of {TIMESTAMP_FORMATS}")
    offset = has_offset(present)
    return ISO_WITH_OFFSET if 2 * int(offset.sum()) >= len(present) else ISO_NAIVE


def parse_kind(text: pa.Array, kind: str, *, checked_range: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Text of a timestamp column of the given kind to (int64 ns UTC, bad mask)."""
    if kind in NS_PER_UNIT:
        return parse_epoch_text(text, kind, checked_range=checked_range)
    return parse_iso(text)


def arrow_type_for(kind: str) -> pa.DataType:
    """The column type pyarrow's CSV parser should produce for a timestamp column of this kind."""
    if kind == ISO_WITH_OFFSET:
        return _UTC_NS
    if kind == ISO_NAIVE:
        return _NAIVE_NS
    return pa.float64()


def typed_to_ns(array: pa.Array, kind: str, *, checked_range: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """A typed timestamp column (pyarrow timestamp of any unit and zone, or epoch numbers) to (ns, bad).

    A timestamp without a zone is read as UTC, as in text.
    """
    bad = array.is_null().to_numpy(zero_copy_only=False) if array.null_count else np.zeros(len(array), bool)
    if pa.types.is_timestamp(array.type):
        target = pa.timestamp("ns", tz=array.type.tz)
        if array.type.unit != "ns":
            values, failed = cast_marking_failures(array, target, None)  # overflow past 2262 fails
            return values, bad | failed
        return _to_numpy(array, np.dtype(np.int64)), bad
    if pa.types.is_integer(array.type) or pa.types.is_floating(array.type) or pa.types.is_decimal(array.type):
        if kind not in NS_PER_UNIT:
            raise ValueError(f"numeric timestamps need an epoch unit, not {kind!r}")
        ns, out_of_range = epoch_to_ns(
            _to_numpy(array.cast(pa.float64()), np.dtype(np.float64)), kind, checked_range=checked_range
        )
        return ns, bad | out_of_range
    return parse_kind(array, kind, checked_range=checked_range)


def _as_string(array: pa.Array) -> pa.Array:
    if pa.types.is_dictionary(array.type):
        array = array.cast(array.type.value_type)
    if not (pa.types.is_string(array.type) or pa.types.is_large_string(array.type)):
        array = array.cast(pa.string())
    return array


def _present(text: pa.Array) -> np.ndarray:
    """Cells holding something: not null and not empty."""
    lengths = pc.fill_null(pc.utf8_length(text), 0)
    return np.asarray(lengths.to_numpy(zero_copy_only=False) > 0, dtype=bool)
