"""The input journal: every MQTT message the service receives, on disk before the broker hears we have it.

The live service appends each message here in the MQTT callback; paho acknowledges a QoS 1 message
only when that callback returns, so anything the broker considers delivered is already in the journal.
A checkpoint (``state.py``) records the journal position its pipeline state includes; after a crash the
service restores the checkpoint and processes the journal from that position before taking new
messages, so no acknowledged sample is lost and each is counted once. The journal also absorbs bursts:
when the in-memory queue is full the pipeline reads the overflow back from here.

Format: segment files ``<number>.journal`` of records ``crc32 | topic length | payload length |
received ns | flags`` followed by the topic and payload bytes. A record cut short by a crash (or one
whose CRC does not match) ends the journal; the writer truncates it when it reopens. Records are
written with one ``writev`` call and no fsync (a killed process loses nothing the kernel has; a power
cut can lose what the kernel had not yet written), and the current segment is fsynced at each
checkpoint. Segments wholly before the last checkpoint are deleted.
"""

from __future__ import annotations

import os
import struct
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

HEADER = struct.Struct("<IIIqB")  # crc32, topic length, payload length, received ns, flags
RETAINED = 1
SEGMENT_BYTES = 64 << 20
_SUFFIX = ".journal"
_MAX_TOPIC = 65_535
_MAX_PAYLOAD = 268_435_455  # the MQTT maximum


@dataclass(frozen=True, order=True)
class Position:
    """A place in the journal: just after a record (or the very start, segment 0 offset 0)."""

    segment: int
    offset: int


@dataclass(frozen=True)
class Record:
    end: Position  # where the next record starts
    topic: str
    payload: bytes
    received_ns: int
    retained: bool


def _segment_path(directory: Path, number: int) -> Path:
    return directory / f"{number:012d}{_SUFFIX}"


def segments(directory: Path) -> list[int]:
    """Segment numbers present, ascending."""
    numbers = []
    for path in directory.glob(f"*{_SUFFIX}"):
        stem = path.name[: -len(_SUFFIX)]
        if stem.isdigit():
            numbers.append(int(stem))
    return sorted(numbers)


def _valid_end(path: Path) -> int:
    """Byte offset just after the last whole, intact record of a segment file."""
    end = 0
    for record_end, *_ in _scan(path, 0):
        end = record_end
    return end


def _scan(path: Path, offset: int, stop: int | None = None) -> Iterator[tuple[int, bytes, bytes, int, int]]:
    """(end offset, topic, payload, received ns, flags) of each intact record from ``offset``."""
    try:
        handle = path.open("rb")
    except FileNotFoundError:
        return
    with handle:
        handle.seek(offset)
        buffer = b""
        position = offset
        while stop is None or position < stop:
            if len(buffer) < HEADER.size:
                more = handle.read(1 << 20)
                if not more:
                    return
                buffer += more
                continue
            crc, topic_length, payload_length, received_ns, flags = HEADER.unpack_from(buffer)
            if topic_length > _MAX_TOPIC or payload_length > _MAX_PAYLOAD:
                return
            size = HEADER.size + topic_length + payload_length
            while len(buffer) < size:
                more = handle.read(max(1 << 20, size - len(buffer)))
                if not more:
                    return  # cut short: the writer died mid-record
                buffer += more
            topic = buffer[HEADER.size : HEADER.size + topic_length]
            payload = buffer[HEADER.size + topic_length : size]
            if zlib.crc32(payload, zlib.crc32(topic)) != crc:
                return
            position += size
            buffer = buffer[size:]
            yield position, topic, payload, received_ns, flags


class JournalWriter:
    """Appends records; one writer per directory, called from the MQTT thread under the caller's lock."""

    def __init__(self, directory: str | Path, segment_bytes: int = SEGMENT_BYTES) -> None:
        self.directory = Path(directory)
        self.directory.mkdir(parents=True, exist_ok=True)
        self.segment_bytes = segment_bytes
        present = segments(self.directory)
        self.segment = present[-1] if present else 1
        path = _segment_path(self.directory, self.segment)
        self.offset = _valid_end(path) if path.exists() else 0
        if path.exists() and path.stat().st_size != self.offset:
            with path.open("r+b") as handle:
                handle.truncate(self.offset)  # a record cut short by a crash
        self._fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o640)

    @property
    def end(self) -> Position:
        return Position(self.segment, self.offset)

    @property
    def start(self) -> Position:
        present = segments(self.directory)
        return Position(present[0] if present else self.segment, 0)

    def append(self, topic: bytes, payload: bytes, received_ns: int, retained: bool) -> Position:
        """Write one record; returns the position just after it."""
        if self.offset >= self.segment_bytes:
            self._rotate()
        crc = zlib.crc32(payload, zlib.crc32(topic))
        header = HEADER.pack(crc, len(topic), len(payload), received_ns, RETAINED if retained else 0)
        size = len(header) + len(topic) + len(payload)
        written = os.writev(self._fd, (header, topic, payload))
        if written != size:
            raise OSError(f"journal {self.segment}: short write ({written} of {size} bytes)")
        self.offset += size
        return Position(self.segment, self.offset)

    def _rotate(self) -> None:
        os.fsync(self._fd)
        os.close(self._fd)
        self.segment += 1
        self.offset = 0
        self._fd = os.open(_segment_path(self.directory, self.segment), os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o640)

    def sync(self) -> None:
        os.fsync(self._fd)

    def drop_before(self, position: Position) -> int:
        """Delete segments that end before ``position``; returns how many were deleted."""
        dropped = 0
        for number in segments(self.directory):
            if number < position.segment and number != self.segment:
                _segment_path(self.directory, number).unlink(missing_ok=True)
                dropped += 1
        return dropped

    def close(self) -> None:
        if self._fd >= 0:
            os.close(self._fd)
            self._fd = -1


def read_journal(directory: str | Path, start: Position, end: Position | None = None) -> Iterator[Record]:
    """Records after ``start`` up to ``end`` (exclusive of anything beyond it), in order."""
    directory = Path(directory)
    for number in segments(directory):
        if number < start.segment or (end is not None and number > end.segment):
            continue
        offset = start.offset if number == start.segment else 0
        stop = end.offset if end is not None and number == end.segment else None
        for record_end, topic, payload, received_ns, flags in _scan(_segment_path(directory, number), offset, stop):
            yield Record(Position(number, record_end), topic.decode("utf-8", "replace"), payload, received_ns,
                         bool(flags & RETAINED))  # fmt: skip
