"""Checkpoints: the pipeline's whole state written to SQLite, periodically and at shutdown, and read at start.

The pipeline's state is a handful of arrays plus the tag table (``Pipeline.snapshot()``); a checkpoint
stores them with the input-journal position they include (``journal.py``) and a little of the service's
own state (which tags are in alarm since when, the duplicate filter). On start the service restores the
newest checkpoint and processes the journal from that position, so a CUSUM halfway to h stays halfway.
A checkpoint made under different settings is never mixed in silently: ``Pipeline.restore`` restarts
the statistics of the tags concerned and the service logs their names.

SQLite (stdlib, WAL journal, synchronous=NORMAL): a checkpoint is one transaction, so a crash during
the write leaves the previous one intact. Only the newest checkpoint is kept.
"""

from __future__ import annotations

import io
import json
import sqlite3
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .journal import Position

FORMAT = 1
_SCHEMA = """
CREATE TABLE IF NOT EXISTS checkpoint (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    created_ns INTEGER NOT NULL,
    journal_segment INTEGER NOT NULL,
    journal_offset INTEGER NOT NULL,
    meta TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS checkpoint_array (
    checkpoint_id INTEGER NOT NULL,
    name TEXT NOT NULL,
    data BLOB NOT NULL,
    PRIMARY KEY (checkpoint_id, name)
);
"""


@dataclass
class Checkpoint:
    snapshot: dict[str, Any]  # as Pipeline.snapshot() gives it
    position: Position  # journal position the snapshot includes
    created_ns: int
    extra_arrays: dict[str, np.ndarray] = field(default_factory=dict)
    extra: dict[str, Any] = field(default_factory=dict)  # JSON-able service state


def connect(path: Path) -> sqlite3.Connection:
    """A SQLite connection in WAL mode: readers never block the writer, and a commit is one append."""
    path.parent.mkdir(parents=True, exist_ok=True)
    connection = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
    connection.execute("PRAGMA journal_mode=WAL")
    connection.execute("PRAGMA synchronous=NORMAL")
    return connection


def _to_blob(array: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.lib.format.write_array(buffer, np.ascontiguousarray(array), allow_pickle=False)
    return buffer.getvalue()


def _from_blob(blob: bytes) -> np.ndarray:
    return np.lib.format.read_array(io.BytesIO(blob), allow_pickle=False)


class CheckpointStore:
    """The newest checkpoint of one service instance, in ``<directory>/checkpoint.sqlite``."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self._db = connect(self.path)
        self._db.executescript(_SCHEMA)

    def save(self, snapshot: dict[str, Any], position: Position, *, extra_arrays: dict[str, np.ndarray] | None = None,
             extra: dict[str, Any] | None = None) -> int:  # fmt: skip
        """Write a checkpoint in one transaction and drop the older ones; returns its id."""
        meta = {key: value for key, value in snapshot.items() if key != "arrays"}
        meta["format"] = FORMAT
        meta["extra"] = extra or {}
        named = [(f"pipeline/{group}/{name}", array)
                 for group, arrays in snapshot["arrays"].items() for name, array in arrays.items()]  # fmt: skip
        named += [(f"extra/{name}", array) for name, array in (extra_arrays or {}).items()]
        db = self._db
        db.execute("BEGIN IMMEDIATE")
        try:
            cursor = db.execute(
                "INSERT INTO checkpoint (created_ns, journal_segment, journal_offset, meta) VALUES (?, ?, ?, ?)",
                (time.time_ns(), position.segment, position.offset, json.dumps(meta)),
            )
            checkpoint_id = int(cursor.lastrowid or 0)
            # One blob at a time (executemany consumes the generator row by row): serialising every array
            # first would double the checkpoint's transient memory, ~50 MB with 100,000 tags.
            db.executemany("INSERT INTO checkpoint_array (checkpoint_id, name, data) VALUES (?, ?, ?)",
                           ((checkpoint_id, name, _to_blob(array)) for name, array in named))  # fmt: skip
            db.execute("DELETE FROM checkpoint_array WHERE checkpoint_id < ?", (checkpoint_id,))
            db.execute("DELETE FROM checkpoint WHERE id < ?", (checkpoint_id,))
            db.execute("COMMIT")
        except BaseException:
            db.execute("ROLLBACK")
            raise
        return checkpoint_id

    def load(self) -> Checkpoint | None:
        row = self._db.execute(
            "SELECT id, created_ns, journal_segment, journal_offset, meta FROM checkpoint ORDER BY id DESC LIMIT 1"
        ).fetchone()
        if row is None:
            return None
        checkpoint_id, created_ns, segment, offset, meta_text = row
        meta = json.loads(meta_text)
        if meta.pop("format", None) != FORMAT:
            return None
        extra = meta.pop("extra", {})
        arrays: dict[str, dict[str, np.ndarray]] = {}
        extra_arrays: dict[str, np.ndarray] = {}
        for name, blob in self._db.execute("SELECT name, data FROM checkpoint_array WHERE checkpoint_id = ?",
                                           (checkpoint_id,)):  # fmt: skip
            kind, _, rest = name.partition("/")
            if kind == "pipeline":
                group, _, column = rest.rpartition("/")
                arrays.setdefault(group, {})[column] = _from_blob(blob)
            elif kind == "extra":
                extra_arrays[rest] = _from_blob(blob)
        snapshot = dict(meta)
        snapshot["arrays"] = arrays
        return Checkpoint(snapshot, Position(int(segment), int(offset)), int(created_ns), extra_arrays, extra)

    def close(self) -> None:
        self._db.close()
