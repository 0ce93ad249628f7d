"""Historian files read as one stream of raw chunks: CSV (plain or compressed) and Parquet, long or wide.

Sits at the start of ``replay``, ``baseline``, ``compare`` and ``publish``. It turns files into arrays
(tag codes, int64 ns UTC, float64 values, uint8 quality) and leaves every judgement about the samples
(order, duplicates, NaN, staleness) to the quality gate. Rows it cannot read at all are skipped and
counted in ``ReadProblems`` with their file:line, or, in strict mode, stop the read.

Speed comes from pyarrow: a CSV file is cut at line ends into pieces of about 64 MiB, and each piece
goes through pyarrow's multithreaded typed parser (timestamps straight to ``timestamp[ns, UTC]``, tags
dictionary-encoded so their codes come free). Only a piece whose typed parse fails is read again as
text, and its bad cells are found with vectorised checks; a clean file never takes that path.
"""

from __future__ import annotations

import mmap
import os
import queue
import threading
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pa_csv
import pyarrow.dataset as pa_dataset
import pyarrow.parquet as pq

from streamguard import timestamps
from streamguard.errors import InputError
from streamguard.quality import INVALID, QUALITY_ENCODINGS, decode_quality
from streamguard.types import GOOD

# Reasons a row is skipped, the keys of ReadProblems.counts.
MALFORMED_ROW = "malformed_row"
BAD_TIMESTAMP = "bad_timestamp"
MISSING_TAG = "missing_tag"
BAD_VALUE = "bad_value"
MISSING_VALUE = "missing_value"
BAD_QUALITY_CODE = "bad_quality_code"

SHAPES = ("auto", "long", "wide")
QUALITY_SUFFIX = ".quality"

# A piece is what one typed parse handles: large enough that pyarrow's threads stay busy and per-piece
# overhead vanishes, small enough that memory stays bounded whatever the file size.
PIECE_BYTES = 64 << 20
PARSER_BLOCK_BYTES = 4 << 20
# Smaller for compressed files, so that parsing starts while the rest is still being decompressed.
COMPRESSED_PIECE_BYTES = 16 << 20
PARQUET_BATCH_ROWS = 1 << 20
# Pieces parsed ahead of the consumer, in a background thread (memory: about two pieces more).
READ_AHEAD_PIECES = 1
# The head read at open time: header, timestamp format, quality encoding, first timestamp.
HEAD_BYTES = 256 << 10

_COMPRESSION_BY_SUFFIX = {".gz": "gzip", ".bz2": "bz2", ".zst": "zstd", ".lz4": "lz4"}
_PARQUET_MAGIC = b"PAR1"
_BYTE_ORDER_MARK = b"\xef\xbb\xbf"


@dataclass(frozen=True)
class InputSettings:
    """The config's ``input:`` section: file shape, column names and how times and quality are written."""

    shape: str = "auto"  # auto | long | wide
    timestamp: str = "timestamp"
    tag: str = "tag"
    value: str = "value"
    quality: str = "quality"
    timestamp_format: str = "auto"  # auto | iso | epoch_s | epoch_ms
    quality_encoding: str = "auto"  # auto | opcua | opc_classic | bool | word


@dataclass
class RawChunk:
    """Samples as read, before the quality gate; arrays may be views into a larger piece, do not write.

    ``names`` holds the tag names the codes index, each used at least once in the chunk. ``first_line``
    is the file line of the first row (header = line 1); for Parquet it is the 1-based row number.
    """

    names: list[str]
    codes: np.ndarray  # int32 index into names
    ts: np.ndarray  # int64 ns UTC
    value: np.ndarray  # float64; NaN and inf pass through for the quality gate to count
    quality: np.ndarray  # uint8 GOOD / UNCERTAIN / BAD
    source: str
    first_line: int

    def __len__(self) -> int:
        return int(self.ts.shape[0])


@dataclass
class ReadProblems:
    """Rows the reader skipped, by reason, with the first few places so the user can look."""

    counts: dict[str, int] = field(default_factory=dict)
    examples: dict[str, list[str]] = field(default_factory=dict)
    rows_read: int = 0
    examples_per_reason: ClassVar[int] = 5

    def add(self, reason: str, count: int, examples: Sequence[str] = ()) -> None:
        """Count ``count`` skipped rows under ``reason``; keep examples up to the cap."""
        if count <= 0:
            return
        self.counts[reason] = self.counts.get(reason, 0) + count
        kept = self.examples.setdefault(reason, [])
        kept.extend(examples[: max(0, self.examples_per_reason - len(kept))])

    @property
    def rows_skipped(self) -> int:
        return sum(self.counts.values())

    def to_dict(self) -> dict[str, Any]:
        return {
            "rows_read": self.rows_read,
            "rows_skipped": self.rows_skipped,
            "counts": dict(sorted(self.counts.items())),
            "examples": {reason: list(self.examples[reason]) for reason in sorted(self.examples)},
        }


def read_historian(
    paths: Sequence[str | Path],
    settings: InputSettings = InputSettings(),
    *,
    strict: bool = False,
    problems: ReadProblems | None = None,
    chunk_rows: int = 1_000_000,
) -> Iterator[RawChunk]:
    """Read historian files as one stream of chunks of at most ``chunk_rows`` rows.

    Files are checked when this is called (missing file, missing column, ambiguous quality codes raise
    InputError at once), then read in the order of their first readable timestamp, each file's rows in
    file order: out-of-order rows inside a file are kept for the quality gate to drop and count. Ordering
    by the first timestamp rather than the minimum means one stray early row at the end of a file costs
    that row, not every row of the files it would otherwise be sorted ahead of.

    Long files have a timestamp, a tag and a value column and an optional quality column (absent: every
    sample GOOD). Wide files have a timestamp column and one column per tag, read row by row and tag
    column by tag column, so each tag's samples stay in time order; a column named ``<tag>.quality``, if
    present, holds that tag's quality; an empty cell is a sample not taken, not a problem.
    ``shape: auto`` reads a file as long when it has the tag column.

    Timestamps without a UTC offset are taken as UTC. Skipped rows are counted in ``problems``
    (``rows_read`` counts the data rows seen, blank lines aside); ``strict`` raises InputError at the
    first one instead.
    """
    if chunk_rows < 1:
        raise ValueError("chunk_rows must be at least 1")
    _check_settings(settings)
    if isinstance(paths, str | Path):  # one path, not a sequence of one-letter paths
        paths = [paths]
    files = [_open(Path(path), settings) for path in paths]
    order = sorted(range(len(files)), key=lambda i: (files[i].first_ts is None, files[i].first_ts or 0, i))
    return _stream([files[i] for i in order], strict, ReadProblems() if problems is None else problems, chunk_rows)


def _stream(
    files: list[_CsvFile | _ParquetFile], strict: bool, problems: ReadProblems, chunk_rows: int
) -> Iterator[RawChunk]:
    def pieces() -> Iterator[tuple[_Piece, str]]:
        for file in files:
            report = _Report(problems, strict, file.place)
            for piece in file.pieces(report):
                yield piece, file.where

    for piece, source in _read_ahead(pieces, READ_AHEAD_PIECES):
        yield from _chunks_of(piece, source, chunk_rows)


@dataclass(frozen=True)
class _Failure:
    error: BaseException


_FINISHED = object()


def _read_ahead(produce: Callable[[], Iterator[Any]], depth: int) -> Iterator[Any]:
    """Run ``produce`` in a background thread, up to ``depth`` items ahead of the consumer.

    While the caller works on one piece the next is being parsed: pyarrow releases the GIL, so its
    threads fill the gaps between pieces and the time the caller spends on its own work. Items and the
    producer's error, if any, arrive in order; closing the iterator stops the producer after its
    current piece.
    """
    handoff: queue.Queue[Any] = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def offer(item: Any) -> bool:
        while not stop.is_set():
            try:
                handoff.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def work() -> None:
        try:
            for item in produce():
                if not offer(item):
                    return
            offer(_FINISHED)
        except BaseException as error:  # noqa: B036 - handed to the consumer and raised there
            offer(_Failure(error))

    worker = threading.Thread(target=work, name="historian-read-ahead", daemon=True)
    worker.start()
    try:
        while True:
            item = handoff.get()
            if item is _FINISHED:
                return
            if isinstance(item, _Failure):
                raise item.error
            yield item
    finally:
        stop.set()
        worker.join()


def _check_settings(settings: InputSettings) -> None:
    for key, value, allowed in (
        ("shape", settings.shape, SHAPES),
        ("timestamp_format", settings.timestamp_format, timestamps.TIMESTAMP_FORMATS),
        ("quality_encoding", settings.quality_encoding, QUALITY_ENCODINGS),
    ):
        if value not in allowed:
            raise InputError(f"input.{key}: {value!r} is not one of {', '.join(allowed)}")


def _open(path: Path, settings: InputSettings) -> _CsvFile | _ParquetFile:
    where = str(path)
    if not path.exists():
        raise InputError(f"{where}: no such file")
    if path.is_dir():
        raise InputError(f"{where}: is a directory, not a historian file")
    try:
        with path.open("rb") as handle:
            magic = handle.read(len(_PARQUET_MAGIC))
    except OSError as error:
        raise InputError(f"{where}: cannot read: {error.strerror or error}") from error
    if magic == _PARQUET_MAGIC:
        return _ParquetFile(path, settings)
    return _CsvFile(path, settings)


# ---------------------------------------------------------------------------------------------------
# What a file's columns mean


@dataclass(frozen=True)
class _Layout:
    shape: str
    timestamp: str
    tag: str = ""
    value: str = ""
    quality: str | None = None
    tags: tuple[str, ...] = ()
    tag_qualities: tuple[str | None, ...] = ()

    @property
    def columns(self) -> list[str]:
        if self.shape == "long":
            return [self.timestamp, self.tag, self.value] + ([self.quality] if self.quality else [])
        return [self.timestamp, *self.tags, *(name for name in self.tag_qualities if name)]


def _layout_of(columns: list[str], settings: InputSettings, where: str) -> _Layout:
    listed = ", ".join(repr(name) for name in columns)
    if settings.timestamp not in columns:
        raise InputError(
            f"{where}: no timestamp column {settings.timestamp!r} (columns: {listed}); set input.timestamp"
        )
    shape = settings.shape
    if shape == "auto":
        shape = "long" if settings.tag in columns else "wide"
    if shape == "long":
        for key, name in (("tag", settings.tag), ("value", settings.value)):
            if name not in columns:
                raise InputError(
                    f"{where}: no {key} column {name!r} for a long file (columns: {listed}); set input.{key}"
                )
        quality = settings.quality if settings.quality in columns else None
        layout = _Layout("long", settings.timestamp, settings.tag, settings.value, quality)
    else:
        present = set(columns)
        tags = tuple(
            name
            for name in columns
            if name != settings.timestamp
            and not (name.endswith(QUALITY_SUFFIX) and name[: -len(QUALITY_SUFFIX)] in present)
        )
        if not tags:
            raise InputError(
                f"{where}: a wide file needs a column per tag beside {settings.timestamp!r} (columns: {listed})"
            )
        qualities = tuple(name + QUALITY_SUFFIX if name + QUALITY_SUFFIX in present else None for name in tags)
        layout = _Layout("wide", settings.timestamp, tags=tags, tag_qualities=qualities)
    for name in layout.columns:
        if columns.count(name) > 1:
            raise InputError(f"{where}: column {name!r} appears {columns.count(name)} times")
    return layout


# ---------------------------------------------------------------------------------------------------
# Skipped rows


class _Report:
    """One file's skipped rows, recorded into ReadProblems; in strict mode the earliest one is raised."""

    def __init__(self, problems: ReadProblems, strict: bool, place: Callable[[int], str]) -> None:
        self.problems = problems
        self.strict = strict
        self.place = place
        self.earliest: tuple[int, str] | None = None

    def skip(self, reason: str, items: np.ndarray, lines: np.ndarray, describe: Callable[[int], str]) -> None:
        """Record skipped rows (or cells) ``items`` found at ``lines`` (ascending).

        ``describe(item)`` words one of them; it is called only for the few kept as examples.
        """
        count = int(items.shape[0])
        if count == 0:
            return
        room = max(0, self.problems.examples_per_reason - len(self.problems.examples.get(reason, [])))
        examples = [f"{self.place(int(lines[i]))}: {describe(int(items[i]))}" for i in range(min(room, count))]
        self.problems.add(reason, count, examples)
        if self.strict and (self.earliest is None or int(lines[0]) < self.earliest[0]):
            self.earliest = (int(lines[0]), f"{self.place(int(lines[0]))}: {describe(int(items[0]))}")

    def end_piece(self, rows_read: int) -> None:
        self.problems.rows_read += rows_read
        if self.earliest is not None:
            raise InputError(self.earliest[1])


# ---------------------------------------------------------------------------------------------------
# Columns to samples


@dataclass
class _Piece:
    names: list[str]
    codes: np.ndarray
    ts: np.ndarray
    value: np.ndarray
    quality: np.ndarray
    first_line: int
    lines: np.ndarray | None  # line of each sample; None: first_line + position


@dataclass(frozen=True)
class _Columns:
    """Arrays of one piece of one file, typed or text, and how to describe their cells."""

    table: pa.Table
    layout: _Layout
    time_kind: str
    epoch_checked: bool
    quality_encoding: str
    where: str
    # CSV dictionaries hold only values seen in the piece; a Parquet batch's may be its row group's.
    dictionary_exact: bool = True

    def array(self, name: str) -> pa.Array:
        column = self.table.column(name)
        return column.chunk(0) if column.num_chunks == 1 else column.combine_chunks()

    def text(self, name: str, row: int) -> str:
        scalar = self.table.column(name)[row]
        try:
            value = scalar.as_py()
        except (ValueError, OverflowError):
            return str(scalar)
        return _tag_name(value) if isinstance(value, bytes | None) else str(value)


_TIME_WORDS = {
    timestamps.ISO_WITH_OFFSET: "an ISO 8601 time",
    timestamps.ISO_NAIVE: "an ISO 8601 time",
    "epoch_s": "epoch seconds",
    "epoch_ms": "epoch milliseconds",
}


def _timestamps_of(columns: _Columns) -> tuple[np.ndarray, np.ndarray]:
    array = columns.array(columns.layout.timestamp)
    return timestamps.typed_to_ns(array, columns.time_kind, checked_range=columns.epoch_checked)


def _numbers_of(columns: _Columns, name: str) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """A value column to (float64, missing, unparsable or None)."""
    array = columns.array(name)
    kind = array.type.value_type if pa.types.is_dictionary(array.type) else array.type
    if pa.types.is_string(kind) or pa.types.is_large_string(kind):
        return timestamps.parse_numbers(array)
    if not (
        pa.types.is_integer(kind)
        or pa.types.is_floating(kind)
        or pa.types.is_decimal(kind)
        or pa.types.is_boolean(kind)
    ):
        raise InputError(f"{columns.where}: column {name!r} holds {array.type}, not numbers")
    numbers = array if pa.types.is_float64(array.type) else array.cast(pa.float64())
    return _filled_numpy(numbers, np.nan), _null_mask(numbers), None


def _qualities_of(columns: _Columns, name: str | None, rows: int) -> np.ndarray:
    if name is None:
        return np.full(rows, GOOD, dtype=np.uint8)
    return decode_quality(columns.array(name), columns.quality_encoding, columns.where)


def _tags_of(columns: _Columns) -> tuple[list[str], np.ndarray, np.ndarray]:
    """The tag column as (names, int32 codes, missing mask); empty names count as missing."""
    array = columns.array(columns.layout.tag)
    if not pa.types.is_dictionary(array.type):
        if not _is_text(array.type):
            array = array.cast(pa.string())
        array = pc.dictionary_encode(array)
    names = [_tag_name(name) for name in array.dictionary.to_pylist()]
    indices = array.indices if pa.types.is_int32(array.indices.type) else array.indices.cast(pa.int32())
    codes = _filled_numpy(indices, -1)
    missing = _null_mask(array)
    for index, name in enumerate(names):
        if name == "":
            missing |= codes == index
    return names, codes, missing


def _is_text(kind: pa.DataType) -> bool:
    return bool(
        pa.types.is_string(kind)
        or pa.types.is_large_string(kind)
        or pa.types.is_binary(kind)
        or pa.types.is_large_binary(kind)
    )


def _tag_name(raw: str | bytes | None) -> str:
    """A tag name as text. CSV tag columns are read as bytes, so that an export in a Windows code page
    (a degree sign, an umlaut) reads instead of failing: UTF-8 is tried first, then cp1252, then latin-1."""
    if raw is None:
        return ""
    if isinstance(raw, str):
        return raw
    for codec in ("utf-8", "cp1252"):
        try:
            return raw.decode(codec)
        except UnicodeDecodeError:
            continue
    return raw.decode("latin-1")


def _null_mask(array: pa.Array) -> np.ndarray:
    if array.null_count == 0:
        return np.zeros(len(array), dtype=bool)
    return np.asarray(array.is_null().to_numpy(zero_copy_only=False), dtype=bool)


def _filled_numpy(array: pa.Array, fill: float) -> np.ndarray:
    """The array as numpy with nulls set to ``fill``; a view, not a copy, when there are no nulls."""
    if array.null_count:
        array = pc.fill_null(array, pa.scalar(fill, array.type))
    return np.asarray(array.to_numpy(zero_copy_only=False))


def _empty_mask(array: pa.Array) -> np.ndarray:
    """Cells with nothing in them: null, or empty text."""
    if pa.types.is_dictionary(array.type):
        empty_entries = _empty_mask(array.dictionary)
        positions = np.asarray(pc.fill_null(array.indices, 0).to_numpy(zero_copy_only=False), dtype=np.int64)
        empty = empty_entries[positions] if len(empty_entries) else np.ones(len(array), dtype=bool)
        return empty | _null_mask(array)
    if _is_text(array.type):
        lengths = pc.fill_null(pc.binary_length(array), 0).to_numpy(zero_copy_only=False)
        return np.asarray(lengths == 0, dtype=bool)
    return _null_mask(array)


def _blank_rows(columns: _Columns) -> np.ndarray:
    """Rows with every needed cell empty: blank lines, skipped without complaint."""
    blank = np.ones(columns.table.num_rows, dtype=bool)
    for name in columns.layout.columns:
        blank &= _empty_mask(columns.array(name))
        if not blank.any():
            break
    return blank


def _long_piece(columns: _Columns, report: _Report, first_line: int, row_lines: np.ndarray | None) -> _Piece:
    layout = columns.layout
    rows = columns.table.num_rows
    ts, ts_bad = _timestamps_of(columns)
    names, codes, tag_missing = _tags_of(columns)
    values, value_missing, value_bad = _numbers_of(columns, layout.value)
    quality = _qualities_of(columns, layout.quality, rows)
    blank = _blank_rows(columns) if ts_bad.any() else np.zeros(rows, dtype=bool)
    describe = _Wording(columns)
    # A row with several faults is counted once, under the first reason in this order.
    checks: list[tuple[str, np.ndarray | None, Callable[[int], str]]] = [
        (BAD_TIMESTAMP, ts_bad, describe.timestamp),
        (MISSING_TAG, tag_missing, describe.missing_tag),
        (BAD_VALUE, value_bad, describe.value_of(layout.value)),
        (MISSING_VALUE, value_missing, describe.missing_value),
        (BAD_QUALITY_CODE, quality == INVALID, describe.quality_of(layout.quality)),
    ]
    drop = blank.copy()
    for reason, mask, wording in checks:
        if mask is None or not mask.any():
            continue
        hit = np.flatnonzero(mask & ~drop)
        report.skip(reason, hit, hit + first_line if row_lines is None else row_lines[hit], wording)
        drop |= mask
    report.end_piece(rows - int(blank.sum()))
    if not drop.any():
        if not columns.dictionary_exact:
            codes, names = _compact(codes, names)
        return _Piece(names, codes, ts, values, quality, first_line, row_lines)
    keep = ~drop
    lines = row_lines if row_lines is not None else first_line + np.arange(rows, dtype=np.int64)
    kept_codes, kept_names = _compact(codes[keep], names)
    kept_lines = lines[keep]
    kept_first = int(kept_lines[0]) if kept_lines.size else first_line
    return _Piece(kept_names, kept_codes, ts[keep], values[keep], quality[keep], kept_first, kept_lines)


def _wide_piece(columns: _Columns, report: _Report, first_line: int, row_lines: np.ndarray | None) -> _Piece:
    layout = columns.layout
    rows = columns.table.num_rows
    tag_count = len(layout.tags)
    ts, ts_bad = _timestamps_of(columns)
    values = np.empty((rows, tag_count), dtype=np.float64)
    absent = np.empty((rows, tag_count), dtype=bool)
    unparsable = np.zeros((rows, tag_count), dtype=bool)
    quality = np.empty((rows, tag_count), dtype=np.uint8)
    for column, (name, quality_name) in enumerate(zip(layout.tags, layout.tag_qualities, strict=True)):
        numbers, missing, bad = _numbers_of(columns, name)
        values[:, column] = numbers
        absent[:, column] = missing
        if bad is not None:
            unparsable[:, column] = bad
        quality[:, column] = _qualities_of(columns, quality_name, rows)
    lines = row_lines if row_lines is not None else first_line + np.arange(rows, dtype=np.int64)
    row_empty = absent.all(axis=1) & ~unparsable.any(axis=1)
    blank = ts_bad & row_empty & _empty_mask(columns.array(layout.timestamp))
    describe = _Wording(columns)
    bad_rows = np.flatnonzero(ts_bad & ~blank)
    report.skip(BAD_TIMESTAMP, bad_rows, lines[bad_rows], describe.timestamp)
    # Cells are numbered row-major (row * tag_count + column), the order samples are handed out in.
    live = ~(ts_bad | blank)[:, None]
    bad_cells = np.flatnonzero(unparsable & live)
    report.skip(BAD_VALUE, bad_cells, lines[bad_cells // tag_count], describe.wide_value)
    bad_quality = (quality == INVALID) & ~absent & ~unparsable & live
    bad_quality_cells = np.flatnonzero(bad_quality)
    report.skip(BAD_QUALITY_CODE, bad_quality_cells, lines[bad_quality_cells // tag_count], describe.wide_quality)
    report.end_piece(rows - int(blank.sum()))
    cells = np.flatnonzero(~absent & ~unparsable & live & ~bad_quality)
    sample_rows = cells // tag_count
    codes, names = _compact((cells % tag_count).astype(np.int32), list(layout.tags))
    sample_lines = lines[sample_rows]
    sample_first = int(sample_lines[0]) if sample_lines.size else first_line
    return _Piece(
        names, codes, ts[sample_rows], values.ravel()[cells], quality.ravel()[cells], sample_first, sample_lines
    )


class _Wording:
    """What to say about a skipped row or cell, looked up only for the few that are reported."""

    def __init__(self, columns: _Columns) -> None:
        self.columns = columns
        self.layout = columns.layout
        self.time_words = _TIME_WORDS.get(columns.time_kind, "a time")
        encoding = columns.quality_encoding
        self.quality_words = "a quality word or boolean" if encoding == "auto" else f"an {encoding} quality code"

    def timestamp(self, row: int) -> str:
        return _describe(self.columns.text(self.layout.timestamp, row), "timestamp", self.time_words)

    def missing_tag(self, row: int) -> str:
        return "empty tag"

    def missing_value(self, row: int) -> str:
        return "empty value"

    def value_of(self, name: str) -> Callable[[int], str]:
        return lambda row: f"value {self.columns.text(name, row)[:60]!r} is not a number"

    def quality_of(self, name: str | None) -> Callable[[int], str]:
        return lambda row: _describe(self.columns.text(name or "", row), "quality", self.quality_words)

    def wide_value(self, cell: int) -> str:
        row, column = divmod(cell, len(self.layout.tags))
        name = self.layout.tags[column]
        return f"{self.value_of(name)(row)} (column {name!r})"

    def wide_quality(self, cell: int) -> str:
        row, column = divmod(cell, len(self.layout.tags))
        name = self.layout.tag_qualities[column]
        return f"{self.quality_of(name)(row)} (column {name!r})"


def _describe(text: str, what: str, expected: str) -> str:
    if text == "":
        return f"empty {what}"
    return f"{what} {text[:60]!r} is not {expected}"


def _compact(codes: np.ndarray, names: list[str]) -> tuple[np.ndarray, list[str]]:
    """Keep only the names the codes use, so a chunk never introduces a tag it has no sample of."""
    if codes.size == 0:
        return codes.astype(np.int32), []
    used = np.bincount(codes, minlength=len(names)) > 0
    if used.all():
        return codes, names
    remap = np.cumsum(used, dtype=np.int32) - 1
    return remap[codes].astype(np.int32), [name for name, keep in zip(names, used, strict=True) if keep]


def _chunks_of(piece: _Piece, source: str, chunk_rows: int) -> Iterator[RawChunk]:
    rows = int(piece.ts.shape[0])
    for start in range(0, rows, chunk_rows):
        stop = min(rows, start + chunk_rows)
        codes, names = piece.codes[start:stop], piece.names
        if stop - start < rows:
            codes, names = _compact(codes, names)
        first_line = piece.first_line + start if piece.lines is None else int(piece.lines[start])
        yield RawChunk(
            names, codes, piece.ts[start:stop], piece.value[start:stop], piece.quality[start:stop], source, first_line
        )


# ---------------------------------------------------------------------------------------------------
# CSV


def _compression(path: Path) -> str | None:
    return _COMPRESSION_BY_SUFFIX.get(path.suffix.lower())


class _CsvFile:
    """A CSV file: header and formats learnt from its head at open, then read piece by piece."""

    def __init__(self, path: Path, settings: InputSettings) -> None:
        self.path = path
        self.where = str(path)
        self.settings = settings
        head, whole = self._head()
        if head.startswith(_BYTE_ORDER_MARK):
            head = head[len(_BYTE_ORDER_MARK) :]
        header_end = head.find(b"\n")
        if not head.strip():
            raise InputError(f"{self.where}: the file is empty; expected a header line")
        if header_end == -1 and not whole:
            raise InputError(f"{self.where}:1: the header line is longer than {HEAD_BYTES} bytes")
        header_line = head if header_end == -1 else head[: header_end + 1]
        self.header = self._parse_header(header_line)
        self.layout = _layout_of(self.header, settings, self.where)
        body = head[len(header_line) :]
        if not whole:
            body = body[: body.rfind(b"\n") + 1]
        try:
            sample = self._read_text(pa.py_buffer(body), use_threads=False)[0] if body.strip() else None
        except pa.ArrowInvalid as error:
            raise InputError(f"{self.where}: cannot parse the first lines: {error}") from error
        times = sample.column(self.layout.timestamp).combine_chunks() if sample else pa.array([], pa.string())
        self.time_kind = timestamps.detect_kind(times, settings.timestamp_format, self.where)
        self.epoch_checked = settings.timestamp_format == "auto"
        ns, bad = timestamps.parse_kind(times, self.time_kind, checked_range=self.epoch_checked)
        self.first_ts: int | None = int(ns[~bad][0]) if (~bad).any() else None
        if sample is not None:
            for name in (self.layout.quality, *self.layout.tag_qualities):
                if name:  # refuses ambiguous integer codes now, before any chunk is handed out
                    decode_quality(sample.column(name), settings.quality_encoding, self.where)
        value_type = pa.float64()
        self.typed_types = {name: value_type for name in self.layout.columns}
        self.typed_types[self.layout.timestamp] = timestamps.arrow_type_for(self.time_kind)
        for name in self._byte_columns():
            self.typed_types[name] = pa.dictionary(pa.int32(), pa.binary())

    def _byte_columns(self) -> list[str]:
        """Text columns read as bytes (see ``_tag_name``): tags and quality codes."""
        return [name for name in (self.layout.tag, self.layout.quality, *self.layout.tag_qualities) if name]

    def place(self, line: int) -> str:
        return f"{self.where}:{line}"

    def _head(self) -> tuple[bytes, bool]:
        try:
            with self._stream() as stream:
                head = stream.read(HEAD_BYTES + 1)
        except (OSError, pa.ArrowException) as error:
            raise InputError(f"{self.where}: cannot read: {error}") from error
        return head[:HEAD_BYTES], len(head) <= HEAD_BYTES

    def _stream(self) -> pa.NativeFile:
        return pa.input_stream(str(self.path), compression=_compression(self.path))

    def _parse_header(self, line: bytes) -> list[str]:
        try:
            table = pa_csv.read_csv(pa.py_buffer(line), read_options=pa_csv.ReadOptions(use_threads=False))
        except pa.ArrowException as error:
            raise InputError(f"{self.where}:1: cannot read the header: {error}") from error
        return [str(name) for name in table.column_names]

    def _read_text(self, buffer: Any, *, use_threads: bool) -> tuple[pa.Table, list[Any]]:
        """Parse with every needed column as text; wrong field counts are set aside, not fatal."""
        malformed: list[Any] = []

        def set_aside(row: Any) -> str:
            malformed.append(row)
            return "skip"

        table = pa_csv.read_csv(
            pa.BufferReader(buffer),
            read_options=pa_csv.ReadOptions(
                column_names=self.header, use_threads=use_threads, block_size=PARSER_BLOCK_BYTES
            ),
            parse_options=pa_csv.ParseOptions(
                ignore_empty_lines=False, newlines_in_values=True, invalid_row_handler=set_aside
            ),
            convert_options=pa_csv.ConvertOptions(
                include_columns=self.layout.columns,
                column_types={
                    name: pa.binary() if name in self._byte_columns() else pa.string() for name in self.layout.columns
                },
                strings_can_be_null=False,
            ),
        )
        return table, malformed

    def _read_typed(self, buffer: Any) -> pa.Table:
        return pa_csv.read_csv(
            pa.BufferReader(buffer),
            read_options=pa_csv.ReadOptions(column_names=self.header, block_size=PARSER_BLOCK_BYTES),
            parse_options=pa_csv.ParseOptions(ignore_empty_lines=False),
            convert_options=pa_csv.ConvertOptions(
                include_columns=self.layout.columns,
                column_types=self.typed_types,
                null_values=[""],
                strings_can_be_null=False,
                timestamp_parsers=[pa_csv.ISO8601],
            ),
        )

    def _columns(self, table: pa.Table) -> _Columns:
        return _Columns(
            table, self.layout, self.time_kind, self.epoch_checked, self.settings.quality_encoding, self.where
        )

    def pieces(self, report: _Report) -> Iterator[_Piece]:
        build = _long_piece if self.layout.shape == "long" else _wide_piece
        line = 2
        for text, quoted in self._line_pieces():
            buffer = pa.py_buffer(text)
            try:
                table: pa.Table | None = self._read_typed(buffer)
            except pa.ArrowInvalid:
                table = None
            # A quoted field may hold a line break; then rows and lines part ways and the text path,
            # which counts lines itself, must place the rows.
            if table is not None and (not quoted or table.num_rows == _count_lines(text)):
                yield build(self._columns(table.unify_dictionaries().combine_chunks()), report, line, None)
                line += table.num_rows
                continue
            yield self._text_piece(text, buffer, quoted, line, report, build)
            line += _count_lines(text)

    def _text_piece(
        self,
        text: Any,
        buffer: pa.Buffer,
        quoted: bool,
        first_line: int,
        report: _Report,
        build: Callable[[_Columns, _Report, int, np.ndarray | None], _Piece],
    ) -> _Piece:
        try:
            table, malformed = self._read_text(buffer, use_threads=True)
            if malformed and malformed[0].number is None:  # row numbers are only known single-threaded
                table, malformed = self._read_text(buffer, use_threads=False)
        except pa.ArrowInvalid as error:
            raise InputError(f"{self.where}:{first_line}: cannot parse the lines from here on: {error}") from error
        record_lines = _record_first_lines(text, first_line, table.num_rows + len(malformed), quoted)
        if malformed:
            positions = np.array([row.number - 1 for row in malformed], dtype=np.int64)
            report.skip(
                MALFORMED_ROW,
                np.arange(len(malformed)),
                record_lines[positions],
                lambda i: f"expected {malformed[i].expected_columns} fields, found {malformed[i].actual_columns}",
            )
            report.problems.rows_read += len(malformed)
            record_lines = np.delete(record_lines, positions)
        return build(self._columns(table), report, first_line, record_lines)

    def _line_pieces(self) -> Iterator[tuple[Any, bool]]:
        """The bytes after the header, decompressed, in pieces that end at a line end.

        Each comes with whether it holds a quote character. A plain file is memory-mapped, so a piece
        is a view and costs no copy.
        """
        try:
            if _compression(self.path) is None:
                yield from self._mapped_pieces()
            else:  # decompression runs a piece ahead, beside the parse of the piece before
                yield from _read_ahead(self._streamed_pieces, 1)
        except (OSError, pa.ArrowException) as error:
            raise InputError(f"{self.where}: cannot read: {error}") from error

    def _mapped_pieces(self) -> Iterator[tuple[Any, bool]]:
        with self.path.open("rb") as handle:
            size = os.fstat(handle.fileno()).st_size
            if size == 0:
                return
            mapped = mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ)
        header_end = mapped.find(b"\n")
        start = size if header_end == -1 else header_end + 1
        view = memoryview(mapped)
        while start < size:
            stop = min(size, start + PIECE_BYTES)
            if stop < size:
                cut = mapped.rfind(b"\n", start, stop)
                if cut == -1:  # a line longer than a piece: take it whole
                    cut = mapped.find(b"\n", stop)
                stop = size if cut == -1 else cut + 1
            yield view[start:stop], mapped.find(b'"', start, stop) != -1
            start = stop

    def _streamed_pieces(self) -> Iterator[tuple[Any, bool]]:
        with self._stream() as stream:
            carry = b""
            header_skipped = False
            while True:
                block = stream.read(COMPRESSED_PIECE_BYTES)
                data = carry + block if carry else block
                cut = len(data) if not block else data.rfind(b"\n") + 1
                carry = data[cut:]
                start = 0
                if not header_skipped and cut:
                    start = data.find(b"\n", 0, cut) + 1 or cut
                    header_skipped = True
                if cut > start:
                    yield memoryview(data)[start:cut], data.find(b'"', start, cut) != -1
                if not block:
                    return


def _count_lines(text: Any) -> int:
    data = bytes(text)
    return data.count(b"\n") + (0 if data.endswith(b"\n") or not data else 1)


def _record_first_lines(text: Any, first_line: int, records: int, quoted: bool) -> np.ndarray:
    """The line each CSV record starts on; a quoted line break makes a record span lines."""
    if not quoted:
        return first_line + np.arange(records, dtype=np.int64)
    data = np.frombuffer(text, dtype=np.uint8)
    line_ends = np.flatnonzero(data == ord("\n"))
    quotes = np.flatnonzero(data == ord('"'))
    # A line end closes a record when an even number of quotes precede it ("" escapes count two).
    closes_record = np.searchsorted(quotes, line_ends) % 2 == 0
    starts = np.concatenate(([0], np.flatnonzero(closes_record) + 1))[:records]
    return first_line + starts.astype(np.int64)


# ---------------------------------------------------------------------------------------------------
# Parquet


class _ParquetFile:
    """A Parquet file, read in record batches in file order; a row's place is its 1-based row number.

    pyarrow's dataset scanner reads ahead and decodes row groups and columns in parallel, which keeps
    a streamed read as fast as reading the whole table at once.
    """

    def __init__(self, path: Path, settings: InputSettings) -> None:
        self.path = path
        self.where = str(path)
        self.settings = settings
        try:
            schema = pq.read_schema(path)
            self.layout = _layout_of(list(schema.names), settings, self.where)
            text_columns = [
                name for name in (self.layout.tag, self.layout.quality) if name and _is_text(schema.field(name).type)
            ]
            read_options = pa_dataset.ParquetReadOptions(dictionary_columns=text_columns)
            self.dataset = pa_dataset.dataset(path, format=pa_dataset.ParquetFileFormat(read_options=read_options))
            # head() runs its scan to the end: no scanner is left half-read with threads behind it.
            sample = self.dataset.head(4096, columns=self.layout.columns)
        except (OSError, pa.ArrowException) as error:
            raise InputError(f"{self.where}: cannot read as Parquet: {error}") from error
        time_type = schema.field(self.layout.timestamp).type
        times = sample.column(self.layout.timestamp).combine_chunks() if sample.num_rows else pa.array([], time_type)
        self.time_kind = self._time_kind(times)
        self.epoch_checked = settings.timestamp_format == "auto"
        ns, bad = timestamps.typed_to_ns(times, self.time_kind, checked_range=self.epoch_checked)
        self.first_ts: int | None = int(ns[~bad][0]) if (~bad).any() else None
        for name in (self.layout.quality, *self.layout.tag_qualities):
            if name and sample.num_rows:
                decode_quality(sample.column(name), settings.quality_encoding, self.where)

    def _time_kind(self, times: pa.Array) -> str:
        kind = times.type
        if pa.types.is_timestamp(kind):
            return timestamps.ISO_WITH_OFFSET  # already a time; the kind only names it in messages
        if pa.types.is_integer(kind) or pa.types.is_floating(kind) or pa.types.is_decimal(kind):
            chosen = self.settings.timestamp_format
            if chosen == "iso":
                raise InputError(
                    f"{self.where}: column {self.layout.timestamp!r} holds numbers, not ISO 8601 text; "
                    "set input.timestamp_format to epoch_s or epoch_ms"
                )
            if chosen == "auto":
                numbers = pc.fill_null(times.cast(pa.float64()), np.nan).to_numpy(zero_copy_only=False)
                return timestamps.epoch_unit_of(np.asarray(numbers), self.where)
            return chosen
        return timestamps.detect_kind(times, self.settings.timestamp_format, self.where)

    def place(self, row: int) -> str:
        return f"{self.where}: row {row}"

    def _batches(self, batch_rows: int) -> Iterator[pa.RecordBatch]:
        return iter(self.dataset.to_batches(columns=self.layout.columns, batch_size=batch_rows, batch_readahead=2))

    def pieces(self, report: _Report) -> Iterator[_Piece]:
        build = _long_piece if self.layout.shape == "long" else _wide_piece
        row = 1
        try:
            for batch in self._batches(PARQUET_BATCH_ROWS):
                if batch.num_rows == 0:
                    continue
                table = pa.Table.from_batches([batch])
                columns = _Columns(
                    table,
                    self.layout,
                    self.time_kind,
                    self.epoch_checked,
                    self.settings.quality_encoding,
                    self.where,
                    dictionary_exact=False,
                )
                yield build(columns, report, row, None)
                row += batch.num_rows
        except (OSError, pa.ArrowException) as error:
            raise InputError(f"{self.where}: cannot read row {row} onwards: {error}") from error
