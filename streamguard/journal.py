"""The input journal: every MQTT message the service receives, on disk before the broker hears we have it.

The live service appends each message here in the MQTT callback; paho acknowledges a QoS 1 message
only when that callback returns, so anything the broker considers delivered is already in the journal.
A checkpoint (``state.py``) records the journal position its pipeline state includes; after a crash the
service restores the checkpoint and processes the journal from that position before taking new
messages, so no acknowledged sample is lost and each is counted once. The journal also absorbs bursts:
when the in-memory queue is full the pipeline reads the overflow back from here.

Format: segment files ``<number>.journal`` of fixed size, mapped into memory, holding records
``crc32 | topic length | payload length | received ns | flags`` followed by the topic and payload bytes;
the CRC covers everything after it, and the header is written last, so a record cut short by a crash
fails its check and ends the journal (the writer clears it when it reopens). Writing through the memory
map is a copy, not a system call: the MQTT thread never gives up the interpreter lock to journal a
message, which matters because taking it back can wait for the processing thread's whole time slice.
The pages belong to the kernel's cache, so a killed process loses nothing; a power cut can lose what the
kernel had not yet written, and the journal is flushed to disk at every checkpoint. Segments wholly
before the last checkpoint are deleted.
"""

from __future__ import annotations

import errno
import mmap
import os
import struct
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

HEADER = struct.Struct("<IIIqB")  # crc32, topic length, payload length, received ns, flags
_AFTER_CRC = struct.Struct("<IIqB")
_CRC = struct.Struct("<I")
VALID = 0x80  # set in every record's flags: a zeroed (unwritten) header is never a record
RETAINED = 0x01
SEGMENT_BYTES = 16 << 20
_SUFFIX = ".journal"
_MAX_TOPIC = 65_535
_MAX_PAYLOAD = 268_435_455  # the MQTT maximum


@dataclass(frozen=True, order=True)
class Position:
    """A place in the journal: just after a record (or the very start of a segment)."""

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


def _checksum(rest_of_header: bytes, topic: bytes, payload: bytes) -> int:
    return zlib.crc32(payload, zlib.crc32(topic, zlib.crc32(rest_of_header)))


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
        while stop is None or position + HEADER.size <= stop:
            if len(buffer) < HEADER.size:
                more = handle.read(1 << 20)
                if not more:
                    return
                buffer += more
                continue
            crc, topic_length, payload_length, received_ns, flags = HEADER.unpack_from(buffer)
            if not flags & VALID or topic_length > _MAX_TOPIC or payload_length > _MAX_PAYLOAD:
                return
            size = HEADER.size + topic_length + payload_length
            while len(buffer) < size:
                more = handle.read(max(1 << 20, size - len(buffer)))
                if not more:
                    return  # cut short
                buffer += more
            topic = buffer[HEADER.size : HEADER.size + topic_length]
            payload = buffer[HEADER.size + topic_length : size]
            if _checksum(buffer[4 : HEADER.size], topic, payload) != crc:
                return
            if stop is not None and position + size > stop:
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
        self.offset = 0
        for end, *_ in _scan(_segment_path(self.directory, self.segment), 0):
            self.offset = end
        self._map: mmap.mmap | None = None
        self._open(self.segment)
        assert self._map is not None
        # Clear whatever a crash left after the last intact record, so it can never be read as one.
        self._map[self.offset : self.offset + min(HEADER.size, len(self._map) - self.offset)] = bytes(
            min(HEADER.size, len(self._map) - self.offset))  # fmt: skip

    def _open(self, number: int) -> None:
        path = _segment_path(self.directory, number)
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o640)
        try:
            size = max(os.fstat(fd).st_size, self.segment_bytes)
            if os.fstat(fd).st_size < size:
                # Reserve the blocks now: a write through the map to a full disk would kill the process
                # (SIGBUS); here it is an OSError the caller counts.
                try:
                    os.posix_fallocate(fd, 0, size)
                except OSError as error:
                    if error.errno not in (errno.EOPNOTSUPP, errno.EINVAL):
                        raise
                    os.ftruncate(fd, size)
            self._map = mmap.mmap(fd, size)
        finally:
            os.close(fd)
        self.capacity = size

    @property
    def end(self) -> Position:
        return Position(self.segment, self.offset)

    @property
    def start(self) -> Position:
        present = segments(self.directory)
        return Position(present[0] if present else self.segment, 0)

    def append(self, topic: bytes, payload: bytes, received_ns: int, retained: bool) -> Position:
        """Write one record; returns the position just after it."""
        size = HEADER.size + len(topic) + len(payload)
        if self.offset + size > self.capacity:
            self._rotate(size)
        rest = _AFTER_CRC.pack(len(topic), len(payload), received_ns, VALID | (RETAINED if retained else 0))
        crc = _checksum(rest, topic, payload)
        start = self.offset
        body = start + HEADER.size
        mapped = self._map
        assert mapped is not None
        mapped[body : start + size] = topic + payload
        mapped[start:body] = _CRC.pack(crc) + rest  # last: the record exists once this lands
        self.offset = start + size
        return Position(self.segment, self.offset)

    def _rotate(self, size: int) -> None:
        self.sync()
        if self._map is not None:
            self._map.close()
        self.segment += 1
        self.offset = 0
        self.segment_bytes = max(self.segment_bytes, size)
        self._open(self.segment)

    def sync(self) -> None:
        if self._map is not None:
            self._map.flush()

    def drop_before(self, position: Position) -> int:
        """Delete segments that end before ``position``; returns how many were deleted."""
        dropped = 0
        for number in segments(self.directory):
            if number < position.segment and number != self.segment:
                _segment_path(self.directory, number).unlink(missing_ok=True)
                dropped += 1
        return dropped

    def close(self) -> None:
        if self._map is not None:
            self._map.flush()
            self._map.close()
            self._map = None


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
