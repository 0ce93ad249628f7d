"""The historian file reader: shapes and formats round-trip, bad rows are counted where they are.

Expected instants come from Python's datetime (ISO 8601 / RFC 3339 offsets), independent of pyarrow;
the files are small and generated in each test.
"""

from __future__ import annotations

import gzip
import threading
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from streamguard.errors import InputError
from streamguard.sources import historian
from streamguard.sources.historian import InputSettings, RawChunk, ReadProblems, read_historian
from streamguard.types import BAD, GOOD, UNCERTAIN

HEADER = "timestamp,tag,value,quality\n"
WORDS = InputSettings(quality_encoding="word")


def reference_ns(text: str) -> int:
    """Nanoseconds since the epoch by the standard library; a naive time is UTC, as the reader documents."""
    moment = datetime.fromisoformat(text)
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    delta = moment - datetime(1970, 1, 1, tzinfo=UTC)
    return (delta.days * 86_400 + delta.seconds) * 1_000_000_000 + delta.microseconds * 1_000


def write(directory: Path, name: str, text: str) -> Path:
    path = directory / name
    if name.endswith(".gz"):
        path.write_bytes(gzip.compress(text.encode()))
    else:
        path.write_text(text)
    return path


def read(paths: list[Path], input_settings: InputSettings = WORDS, **options: object) -> tuple[dict, list[RawChunk]]:
    """Read everything; return the samples concatenated (tags as names) and the chunks."""
    chunks = list(read_historian(paths, input_settings, **options))  # type: ignore[arg-type]
    joined = {
        "tag": [chunk.names[code] for chunk in chunks for code in chunk.codes],
        "ts": np.concatenate([chunk.ts for chunk in chunks]) if chunks else np.zeros(0, np.int64),
        "value": np.concatenate([chunk.value for chunk in chunks]) if chunks else np.zeros(0),
        "quality": np.concatenate([chunk.quality for chunk in chunks]) if chunks else np.zeros(0, np.uint8),
        "source": [chunk.source for chunk in chunks for _ in range(len(chunk))],
    }
    return joined, chunks


def long_text(count: int, seed: int) -> tuple[str, dict]:
    """A long CSV of ``count`` rows over three tags, and the samples it holds."""
    rng = np.random.default_rng(seed)
    tags = rng.choice(["FIC101.PV", "TI202.PV", "PT303.PV"], size=count).tolist()
    values = np.round(rng.normal(50.0, 5.0, size=count), 6)
    words = rng.choice(["good", "uncertain", "bad"], size=count).tolist()
    stamps = [f"2024-03-01T{10 + i // 3600:02d}:{i // 60 % 60:02d}:{i % 60:02d}+02:00" for i in range(count)]
    lines = [
        f"{stamp},{tag},{value!r},{word}\n"
        for stamp, tag, value, word in zip(stamps, tags, values.tolist(), words, strict=True)
    ]
    level = {"good": GOOD, "uncertain": UNCERTAIN, "bad": BAD}
    expected = {
        "tag": tags,
        "ts": np.array([reference_ns(stamp) for stamp in stamps]),
        "value": values,
        "quality": np.array([level[word] for word in words], dtype=np.uint8),
    }
    return HEADER + "".join(lines), expected


def assert_samples(got: dict, expected: dict) -> None:
    assert got["tag"] == expected["tag"]
    assert np.array_equal(got["ts"], expected["ts"])
    assert np.array_equal(got["value"], expected["value"])
    assert np.array_equal(got["quality"], expected["quality"])


# --- shapes and formats -------------------------------------------------------------------------------


def test_long_csv_round_trip(tmp_path: Path) -> None:
    """Every row of a clean long file comes back, in file order, with offsets applied."""
    text, expected = long_text(300, seed=1)
    problems = ReadProblems()
    got, chunks = read([write(tmp_path, "day.csv", text)], problems=problems)
    assert_samples(got, expected)
    assert problems.rows_read == 300 and problems.counts == {}
    assert chunks[0].first_line == 2 and chunks[0].source == str(tmp_path / "day.csv")
    assert chunks[0].codes.dtype == np.int32 and chunks[0].ts.dtype == np.int64
    assert chunks[0].value.dtype == np.float64 and chunks[0].quality.dtype == np.uint8


def test_gzip_reads_like_plain(tmp_path: Path) -> None:
    """A .csv.gz is decompressed by its extension and reads to the same samples."""
    text, expected = long_text(200, seed=2)
    path = write(tmp_path, "day.csv.gz", text)
    got, _ = read([path])
    assert_samples(got, expected)
    assert sum(len(chunk) for chunk in read_historian(str(path), WORDS)) == 200  # one path, not a list


def test_no_quality_column_means_good(tmp_path: Path) -> None:
    """Without a quality column every sample is GOOD."""
    path = write(tmp_path, "a.csv", "timestamp,tag,value\n2024-03-01T00:00:00Z,A,1\n2024-03-01T00:00:01Z,A,2\n")
    got, _ = read([path])
    assert got["quality"].tolist() == [GOOD, GOOD]


def test_wide_csv_is_read_row_by_row_and_empty_cells_are_absent(tmp_path: Path) -> None:
    """Row-major order keeps each tag in time order; <tag>.quality columns apply to their tag only."""
    path = write(
        tmp_path,
        "wide.csv",
        (
            "timestamp,A,B,B.quality,C\n"
            "2024-03-01T00:00:00Z,1.0,2.0,good,3.0\n"
            "2024-03-01T00:00:01Z,,5.0,bad,6.0\n"
            "2024-03-01T00:00:02Z,7.0,,,9.0\n"
        ),
    )
    problems = ReadProblems()
    got, chunks = read([path], problems=problems)
    second = 1_000_000_000
    start = reference_ns("2024-03-01T00:00:00Z")
    assert got["tag"] == ["A", "B", "C", "B", "C", "A", "C"]
    assert got["ts"].tolist() == [
        start,
        start,
        start,
        start + second,
        start + second,
        start + 2 * second,
        start + 2 * second,
    ]
    assert got["value"].tolist() == [1.0, 2.0, 3.0, 5.0, 6.0, 7.0, 9.0]
    assert got["quality"].tolist() == [GOOD, GOOD, GOOD, BAD, GOOD, GOOD, GOOD]
    assert problems.counts == {} and problems.rows_read == 3
    assert chunks[0].first_line == 2


def test_shape_is_chosen_by_the_tag_column(tmp_path: Path) -> None:
    """A file with a 'tag' column is long; forcing wide reads its columns as tags."""
    path = write(tmp_path, "a.csv", "timestamp,tag,value\n2024-03-01T00:00:00Z,7,1.5\n")
    got, _ = read([path])
    assert got["tag"] == ["7"] and got["value"].tolist() == [1.5]
    got, _ = read([path], InputSettings(shape="wide"))
    assert got["tag"] == ["tag", "value"] and got["value"].tolist() == [7.0, 1.5]


def test_configured_column_names(tmp_path: Path) -> None:
    """Column names come from the input settings."""
    path = write(tmp_path, "a.csv", "Time,Name,Val,Q\n2024-03-01T00:00:00Z,A,1.5,192\n")
    names = InputSettings(timestamp="Time", tag="Name", value="Val", quality="Q", quality_encoding="opc_classic")
    got, _ = read([path], names)
    assert got["tag"] == ["A"] and got["quality"].tolist() == [GOOD]


def test_parquet_long_round_trip(tmp_path: Path) -> None:
    """Parquet with a typed UTC timestamp column, string tags and OPC UA status codes."""
    start = reference_ns("2024-03-01T00:00:00Z")
    table = pa.table(
        {
            "timestamp": pa.array(
                np.array([start, start + 10**9, start + 2 * 10**9]) // 10**6, pa.timestamp("ms", tz="Europe/Berlin")
            ),
            "tag": ["A", "B", "A"],
            "value": [1.0, 2.0, np.nan],
            "quality": pa.array([0x00000000, 0x80310000, 0x40900000], pa.uint32()),
        }
    )
    path = tmp_path / "a.parquet"
    pq.write_table(table, path)
    got, chunks = read([path], InputSettings(quality_encoding="opcua"))
    assert got["tag"] == ["A", "B", "A"]
    assert got["ts"].tolist() == [start, start + 10**9, start + 2 * 10**9]
    assert got["value"][:2].tolist() == [1.0, 2.0] and np.isnan(got["value"][2])
    assert got["quality"].tolist() == [GOOD, BAD, UNCERTAIN]
    assert chunks[0].first_line == 1


def test_parquet_wide_with_naive_and_text_timestamps(tmp_path: Path) -> None:
    """Naive Parquet timestamps are UTC; ISO text columns parse as in CSV; nulls are absent samples."""
    start = reference_ns("2024-03-01T00:00:00Z")
    naive = pa.table(
        {
            "timestamp": pa.array([start, start + 10**9], pa.timestamp("ns")),
            "A": [1.0, None],
            "B": pa.array([3, 4], pa.int32()),
        }
    )
    pq.write_table(naive, tmp_path / "naive.parquet")
    got, _ = read([tmp_path / "naive.parquet"])
    assert got["tag"] == ["A", "B", "B"] and got["value"].tolist() == [1.0, 3.0, 4.0]
    assert got["ts"].tolist() == [start, start, start + 10**9]
    text = pa.table({"timestamp": ["2024-03-01T02:00:00+02:00"], "A": [1.0]})
    pq.write_table(text, tmp_path / "text.parquet")
    got, _ = read([tmp_path / "text.parquet"])
    assert got["ts"].tolist() == [start]


def test_iso_forms_in_one_file(tmp_path: Path) -> None:
    """Offsets, Z, fractions and naive times may mix in one file; each lands on its instant."""
    stamps = [
        "2024-03-01T02:00:00+02:00",
        "2024-03-01T00:00:01Z",
        "2024-03-01T00:00:02.25Z",
        "2024-03-01T00:00:03.123456-01:00",
        "2024-03-01T00:00:04",
        "2024-03-01 00:00:05",
    ]
    text = HEADER + "".join(f"{stamp},A,{i},good\n" for i, stamp in enumerate(stamps))
    problems = ReadProblems()
    got, _ = read([write(tmp_path, "a.csv", text)], problems=problems)
    assert got["ts"].tolist() == [reference_ns(stamp) for stamp in stamps]
    assert problems.counts == {}


def test_naive_file_is_utc(tmp_path: Path) -> None:
    """A file with no offsets at all is read as UTC."""
    text = HEADER + "2024-03-01T00:00:00,A,1,good\n2024-03-01T00:00:00.5,A,2,good\n"
    got, _ = read([write(tmp_path, "a.csv", text)])
    assert got["ts"].tolist() == [reference_ns("2024-03-01T00:00:00Z"), reference_ns("2024-03-01T00:00:00.5Z")]


@pytest.mark.parametrize(
    ("stamps", "scale"), [(["1709251200", "1709251200.5"], 10**9), (["1709251200000", "1709251200500"], 10**6)]
)
def test_epoch_seconds_and_milliseconds_by_magnitude(tmp_path: Path, stamps: list[str], scale: int) -> None:
    """Numeric timestamps are epoch seconds below 1e11 and milliseconds below 1e14 (auto)."""
    text = HEADER + "".join(f"{stamp},A,1,good\n" for stamp in stamps)
    got, _ = read([write(tmp_path, "a.csv", text)])
    expected = [round(float(stamp) * scale) for stamp in stamps]
    assert got["ts"].tolist() == expected
    assert expected[0] == reference_ns("2024-03-01T00:00:00Z")


def test_epoch_too_large_for_auto_names_the_file(tmp_path: Path) -> None:
    """Epoch nanoseconds are neither unit: an error naming the file and the setting."""
    path = write(tmp_path, "ns.csv", HEADER + "1709251200000000000,A,1,good\n")
    with pytest.raises(InputError, match=rf"^{path}: .*input\.timestamp_format"):
        read([path])


def test_explicit_epoch_format(tmp_path: Path) -> None:
    """timestamp_format: epoch_ms reads small numbers as milliseconds too."""
    path = write(tmp_path, "a.csv", HEADER + "1500,A,1,good\n")
    got, _ = read([path], InputSettings(timestamp_format="epoch_ms", quality_encoding="word"))
    assert got["ts"].tolist() == [1_500_000_000]


# --- problems -----------------------------------------------------------------------------------------

DIRTY_ROWS = [
    "2024-03-01T00:00:00Z,A,1,good",  # line 2
    "2024-13-01T00:00:00Z,A,2,good",  # 3 bad timestamp
    "2024-03-01T00:00:02Z,B,3,bad",  # 4
    "",  # 5 blank: not a problem
    "2024-03-01T00:00:03Z,A,abc,good",  # 6 bad value
    "2024-03-01T00:00:04Z,A,,good",  # 7 missing value
    "2024-03-01T00:00:05Z,A,5,good,extra",  # 8 malformed
    "2024-03-01T00:00:06Z,,6,good",  # 9 missing tag
    "2024-03-01T00:00:07Z,A,7,excellent",  # 10 bad quality code
    "2024-03-01T00:00:08Z,A,NaN,good",  # 11 NaN is a value for the gate to judge
    "x,A,9,good",  # 12 bad timestamp
    "2024-03-01T00:00:10Z,C,10,uncertain",  # 13
]


def expected_problem_lines(path: Path) -> dict[str, list[str]]:
    return {
        "bad_timestamp": [f"{path}:3", f"{path}:12"],
        "bad_value": [f"{path}:6"],
        "missing_value": [f"{path}:7"],
        "malformed_row": [f"{path}:8"],
        "missing_tag": [f"{path}:9"],
        "bad_quality_code": [f"{path}:10"],
    }


def check_dirty_read(path: Path) -> None:
    problems = ReadProblems()
    got, _ = read([path], problems=problems)
    assert got["tag"] == ["A", "B", "A", "C"]
    assert got["value"][:2].tolist() == [1.0, 3.0] and np.isnan(got["value"][2]) and got["value"][3] == 10.0
    places = {
        reason: [example.split(": ")[0] for example in examples] for reason, examples in problems.examples.items()
    }
    assert places == expected_problem_lines(path)
    assert problems.counts == {reason: len(lines) for reason, lines in expected_problem_lines(path).items()}
    assert problems.rows_read == 11  # twelve lines after the header, one of them blank


@pytest.mark.parametrize("name", ["dirty.csv", "dirty.csv.gz"])
def test_bad_rows_are_skipped_and_counted_at_their_lines(tmp_path: Path, name: str) -> None:
    """Each kind of bad row is counted once under its reason, with its physical line number."""
    check_dirty_read(write(tmp_path, name, HEADER + "\n".join(DIRTY_ROWS) + "\n"))


@pytest.mark.parametrize("name", ["dirty.csv", "dirty.csv.gz"])
@pytest.mark.parametrize("piece_bytes", [40, 97, 256])
def test_line_numbers_hold_across_pieces(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, name: str, piece_bytes: int
) -> None:
    """Cutting the file into many small pieces changes neither the samples nor the places."""
    monkeypatch.setattr(historian, "PIECE_BYTES", piece_bytes)
    monkeypatch.setattr(historian, "COMPRESSED_PIECE_BYTES", piece_bytes)
    check_dirty_read(write(tmp_path, name, HEADER + "\n".join(DIRTY_ROWS) + "\n"))


def test_quoted_line_break_shifts_the_following_lines(tmp_path: Path) -> None:
    """A quoted field spanning two lines is one row; later rows keep their physical line numbers."""
    text = HEADER + '2024-03-01T00:00:00Z,"two\nlines",1,good\n2024-03-01T00:00:01Z,A,abc,good\n'
    problems = ReadProblems()
    got, _ = read([write(tmp_path, "q.csv", text)], problems=problems)
    assert got["tag"] == ["two\nlines"]
    assert problems.examples["bad_value"] == [f"{tmp_path / 'q.csv'}:4: value 'abc' is not a number"]


def test_examples_are_capped_and_counts_are_not(tmp_path: Path) -> None:
    """Only the first five places per reason are kept; the count covers every skipped row."""
    rows = [f"2024-03-01T00:00:{i:02d}Z,A,bad{i},good" for i in range(12)]
    problems = ReadProblems()
    read([write(tmp_path, "a.csv", HEADER + "\n".join(rows) + "\n")], problems=problems)
    assert problems.counts == {"bad_value": 12}
    assert len(problems.examples["bad_value"]) == 5
    assert problems.to_dict()["rows_skipped"] == 12


def test_wide_bad_timestamp_skips_the_row_and_bad_cells_skip_the_cell(tmp_path: Path) -> None:
    """In a wide file a bad timestamp costs its row; an unparsable cell costs only that sample."""
    path = write(tmp_path, "w.csv", "timestamp,A,B\n2024-03-01T00:00:00Z,1,x\nnever,2,3\n2024-03-01T00:00:02Z,4,5\n")
    problems = ReadProblems()
    got, _ = read([path], problems=problems)
    assert got["tag"] == ["A", "A", "B"] and got["value"].tolist() == [1.0, 4.0, 5.0]
    assert problems.examples == {
        "bad_value": [f"{path}:2: value 'x' is not a number (column 'B')"],
        "bad_timestamp": [f"{path}:3: timestamp 'never' is not an ISO 8601 time"],
    }


def test_strict_mode_stops_at_the_first_bad_row_with_its_place(tmp_path: Path) -> None:
    """strict=True raises InputError naming file:line of the earliest bad row."""
    path = write(tmp_path, "dirty.csv", HEADER + "\n".join(DIRTY_ROWS) + "\n")
    with pytest.raises(InputError, match=rf"^{path}:3: timestamp '2024-13-01T00:00:00Z' is not an ISO 8601 time$"):
        read([path], strict=True)


def test_strict_mode_reports_a_malformed_row_before_later_problems(tmp_path: Path) -> None:
    """The earliest line wins whatever the reason."""
    path = write(tmp_path, "a.csv", HEADER + "2024-03-01T00:00:00Z,A,1,good,extra\n2024-03-01T00:00:01Z,A,x,good\n")
    with pytest.raises(InputError, match=rf"^{path}:2: expected 4 fields, found 5$"):
        read([path], strict=True)


def test_parquet_problems_are_placed_by_row(tmp_path: Path) -> None:
    """Parquet rows have no lines; problems name the 1-based row."""
    path = tmp_path / "a.parquet"
    pq.write_table(
        pa.table(
            {"timestamp": ["2024-03-01T00:00:00Z", "2024-03-01T00:00:01Z"], "tag": ["A", "A"], "value": ["1.5", "oops"]}
        ),
        path,
    )
    problems = ReadProblems()
    got, _ = read([path], problems=problems)
    assert got["value"].tolist() == [1.5]
    assert problems.examples == {"bad_value": [f"{path}: row 2: value 'oops' is not a number"]}


def test_epoch_value_out_of_the_files_unit_is_a_bad_timestamp(tmp_path: Path) -> None:
    """Under auto, a millisecond count in a seconds file is skipped, not placed in the year 55000."""
    text = HEADER + "1709251200,A,1,good\n1709251200000,A,2,good\n1709251201,A,3,good\n"
    problems = ReadProblems()
    got, _ = read([write(tmp_path, "a.csv", text)], problems=problems)
    assert got["value"].tolist() == [1.0, 3.0] and problems.counts == {"bad_timestamp": 1}


# --- files --------------------------------------------------------------------------------------------


def test_files_are_read_in_order_of_their_first_timestamp(tmp_path: Path) -> None:
    """Files given late-first are read early-first; rows inside a file keep their order."""
    late = write(tmp_path, "late.csv", HEADER + "2024-03-02T00:00:00Z,A,3,good\n2024-03-02T00:00:01Z,A,4,good\n")
    early = write(
        tmp_path, "early.csv", HEADER + "2024-03-01T00:00:05Z,A,1,good\n2024-03-01T00:00:00Z,A,2,good\n"
    )  # out of order inside: kept for the gate
    got, _ = read([late, early])
    assert got["value"].tolist() == [1.0, 2.0, 3.0, 4.0]
    assert got["source"] == [str(early)] * 2 + [str(late)] * 2


def test_ordering_uses_the_first_row_not_a_stray_minimum(tmp_path: Path) -> None:
    """A stray early row at the end of a file does not pull the whole file ahead of its neighbour."""
    first = write(tmp_path, "b.csv", HEADER + "2024-03-01T10:00:00Z,A,1,good\n2024-03-01T08:00:00Z,A,2,good\n")
    second = write(tmp_path, "a.csv", HEADER + "2024-03-01T09:00:00Z,A,3,good\n")
    got, _ = read([first, second])
    assert got["value"].tolist() == [3.0, 1.0, 2.0]


def test_missing_file_and_missing_column_name_the_path(tmp_path: Path) -> None:
    """Errors are raised when the read is set up, before any chunk, and say what to fix."""
    with pytest.raises(InputError, match=rf"^{tmp_path / 'nope.csv'}: no such file"):
        read_historian([tmp_path / "nope.csv"])
    path = write(tmp_path, "a.csv", "time,tag,value\n2024-03-01T00:00:00Z,A,1\n")
    with pytest.raises(InputError, match=rf"^{path}: no timestamp column 'timestamp'.*set input\.timestamp"):
        read_historian([path])
    path = write(tmp_path, "b.csv", "timestamp,tag,val\n2024-03-01T00:00:00Z,A,1\n")
    with pytest.raises(InputError, match=rf"^{path}: no value column 'value'"):
        read_historian([path])


def test_integer_quality_under_auto_is_refused_before_reading(tmp_path: Path) -> None:
    """The ambiguity (OPC UA 0 = Good, classic 0 = Bad) is reported at open, with the setting to change."""
    path = write(tmp_path, "a.csv", HEADER + "2024-03-01T00:00:00Z,A,1,0\n")
    with pytest.raises(InputError, match=rf"^{path}: .*set input\.quality_encoding to opcua or opc_classic"):
        read_historian([path], InputSettings())


def test_header_only_and_empty_files(tmp_path: Path) -> None:
    """A header with no rows yields nothing; an empty file is an error."""
    got, chunks = read([write(tmp_path, "h.csv", HEADER)])
    assert chunks == []
    with pytest.raises(InputError, match="empty"):
        read_historian([write(tmp_path, "e.csv", "")])


def test_chunks_respect_chunk_rows_and_carry_their_first_line(tmp_path: Path) -> None:
    """Chunks hold at most chunk_rows rows and know the line their first row came from."""
    text, _ = long_text(10, seed=3)
    _, chunks = read([write(tmp_path, "a.csv", text)], chunk_rows=4)
    assert [len(chunk) for chunk in chunks] == [4, 4, 2]
    assert [chunk.first_line for chunk in chunks] == [2, 6, 10]
    for chunk in chunks:
        assert sorted(set(chunk.codes.tolist())) == list(range(len(chunk.names)))


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(chunk_rows=st.integers(1, 150), piece_bytes=st.integers(30, 3000))
def test_any_chunk_size_gives_the_same_stream(tmp_path: Path, chunk_rows: int, piece_bytes: int) -> None:
    """Chunk and piece boundaries are invisible in the concatenated samples."""
    text, expected = long_text(120, seed=4)
    dirty = text + "2024-03-01T11:00:00+02:00,A,oops,good\n"  # one bad row at the end
    path = tmp_path / "h.csv"
    if not path.exists():
        path.write_text(dirty)
    original = historian.PIECE_BYTES
    historian.PIECE_BYTES = piece_bytes
    try:
        problems = ReadProblems()
        got, chunks = read([path], chunk_rows=chunk_rows, problems=problems)
    finally:
        historian.PIECE_BYTES = original
    assert_samples(got, expected)
    assert all(1 <= len(chunk) <= chunk_rows for chunk in chunks)
    assert problems.examples["bad_value"] == [f"{path}:122: value 'oops' is not a number"]


def test_byte_order_mark_and_crlf_line_ends(tmp_path: Path) -> None:
    """A spreadsheet export's UTF-8 byte order mark and CRLF line ends change neither names nor lines."""
    path = tmp_path / "excel.csv"
    path.write_bytes(b"\xef\xbb\xbftimestamp,tag,value\r\n2024-03-01T00:00:00Z,A,1\r\n2024-03-01T00:00:01Z,A,x\r\n")
    problems = ReadProblems()
    got, _ = read([path], problems=problems)
    assert got["tag"] == ["A"] and got["value"].tolist() == [1.0]
    assert problems.examples == {"bad_value": [f"{path}:3: value 'x' is not a number"]}


def test_tag_names_in_a_windows_code_page(tmp_path: Path) -> None:
    """Tag names written in cp1252 (a degree sign, an umlaut) read instead of failing the file."""
    path = tmp_path / "cp1252.csv"
    path.write_bytes("timestamp,tag,value\n2024-03-01T00:00:00Z,Tür TI-1 [°C],1\n".encode("cp1252"))
    got, _ = read([path])
    assert got["tag"] == ["Tür TI-1 [°C]"]


def test_parquet_row_groups_keep_file_order_and_row_numbers(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Many row groups read in batches come back in file order, problems placed by row."""
    monkeypatch.setattr(historian, "PARQUET_BATCH_ROWS", 7)
    count = 100
    values = [str(i) for i in range(count)]
    values[61] = "sixty-one"
    table = pa.table(
        {
            "timestamp": pa.array(np.arange(count) * 10**9 + 1_709_251_200 * 10**9, pa.timestamp("ns", tz="UTC")),
            "tag": [f"T{i % 4}" for i in range(count)],
            "value": values,
        }
    )
    path = tmp_path / "groups.parquet"
    pq.write_table(table, path, row_group_size=10)
    problems = ReadProblems()
    got, chunks = read([path], chunk_rows=5, problems=problems)
    assert got["value"].tolist() == [float(i) for i in range(count) if i != 61]
    assert got["tag"] == [f"T{i % 4}" for i in range(count) if i != 61]
    assert problems.examples == {"bad_value": [f"{path}: row 62: value 'sixty-one' is not a number"]}
    assert chunks[0].first_line == 1 and max(len(chunk) for chunk in chunks) <= 5


def test_stopping_early_stops_the_read_ahead(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Leaving the loop after one chunk ends the background reader; no thread is left behind."""
    monkeypatch.setattr(historian, "PIECE_BYTES", 200)
    text, _ = long_text(300, seed=5)
    stream = read_historian([write(tmp_path, "a.csv", text)], WORDS, chunk_rows=3)
    first = next(stream)
    assert len(first) == 3
    stream.close()  # type: ignore[attr-defined]
    assert not [thread for thread in threading.enumerate() if thread.name == "historian-read-ahead"]


def test_an_error_in_a_later_file_arrives_after_the_earlier_files_chunks(tmp_path: Path) -> None:
    """In strict mode the chunks before the bad row are delivered first, then the error."""
    good = write(tmp_path, "good.csv", HEADER + "2024-03-01T00:00:00Z,A,1,good\n")
    bad = write(tmp_path, "bad.csv", HEADER + "2024-03-02T00:00:00Z,A,1,good\n2024-03-02T00:00:01Z,A,?,good\n")
    received = []
    with pytest.raises(InputError, match=rf"^{bad}:3: value '\?' is not a number$"):
        for chunk in read_historian([bad, good], WORDS, strict=True):
            received.append(chunk.source)
    assert received == [str(good)]
