"""The outbox: every message the service must publish (alarm events, per-tag state), on disk first.

A row is written before it is handed to the MQTT client and marked when the broker acknowledges it
(PUBACK). Rows are published in the order they were written (``seq``), so after a broker outage or a
restart the backlog goes out in order with the ids it was raised with. Each row has a unique ``key``
(the event id, or ``state:<event id>``): an event raised again while the service processes its input
journal after a crash is recognised and not published a second time if the broker already has it.

SQLite (stdlib, WAL, synchronous=NORMAL), used from the service's processing thread only.
"""

from __future__ import annotations

import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path

from ..state import connect

_SCHEMA = """
CREATE TABLE IF NOT EXISTS outbox (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    key TEXT NOT NULL UNIQUE,
    topic TEXT NOT NULL,
    payload BLOB NOT NULL,
    retain INTEGER NOT NULL,
    created_ns INTEGER NOT NULL,
    acked_ns INTEGER
);
CREATE INDEX IF NOT EXISTS outbox_pending ON outbox (seq) WHERE acked_ns IS NULL;
"""


@dataclass(frozen=True)
class OutboxRow:
    seq: int
    topic: str
    payload: bytes
    retain: bool


class Outbox:
    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self._db = connect(self.path)
        self._db.executescript(_SCHEMA)
        self.backlog = int(self._db.execute("SELECT COUNT(*) FROM outbox WHERE acked_ns IS NULL").fetchone()[0])
        self.last_seq = int(self._db.execute("SELECT COALESCE(MAX(seq), 0) FROM outbox").fetchone()[0])

    def add(self, rows: Sequence[tuple[str, str, bytes, bool]]) -> list[bool]:
        """Write (key, topic, payload, retain) rows in one transaction; True where the key was new."""
        if not rows:
            return []
        now = time.time_ns()
        new: list[bool] = []
        db = self._db
        db.execute("BEGIN IMMEDIATE")
        try:
            for key, topic, payload, retain in rows:
                cursor = db.execute(
                    "INSERT OR IGNORE INTO outbox (key, topic, payload, retain, created_ns) VALUES (?, ?, ?, ?, ?)",
                    (key, topic, payload, int(retain), now),
                )
                inserted = cursor.rowcount == 1
                new.append(inserted)
                if inserted:
                    self.backlog += 1
                    self.last_seq = int(cursor.lastrowid or self.last_seq)
            db.execute("COMMIT")
        except BaseException:
            db.execute("ROLLBACK")
            raise
        return new

    def known(self, keys: Sequence[str]) -> set[str]:
        """The keys already written (an event raised again while the journal is processed after a crash)."""
        found: set[str] = set()
        for start in range(0, len(keys), 500):
            chunk = list(keys[start : start + 500])
            marks = ",".join("?" * len(chunk))
            found.update(k for (k,) in self._db.execute(f"SELECT key FROM outbox WHERE key IN ({marks})", chunk))
        return found

    def pending(self, after_seq: int, limit: int) -> list[OutboxRow]:
        """Unacknowledged rows after ``after_seq``, oldest first."""
        cursor = self._db.execute(
            "SELECT seq, topic, payload, retain FROM outbox WHERE acked_ns IS NULL AND seq > ? ORDER BY seq LIMIT ?",
            (after_seq, limit),
        )
        return [OutboxRow(int(s), str(t), bytes(p), bool(r)) for s, t, p, r in cursor]

    def mark_acked(self, seqs: Iterable[int]) -> None:
        batch = [(time.time_ns(), seq) for seq in seqs]
        if not batch:
            return
        db = self._db
        db.execute("BEGIN IMMEDIATE")
        try:
            changed = 0
            for row in batch:
                changed += db.execute("UPDATE outbox SET acked_ns = ? WHERE seq = ? AND acked_ns IS NULL", row).rowcount
            db.execute("COMMIT")
        except BaseException:
            db.execute("ROLLBACK")
            raise
        self.backlog -= changed

    def prune(self, acked_before_ns: int) -> int:
        """Forget acknowledged rows older than the given time (they can no longer be raised again)."""
        cursor = self._db.execute("DELETE FROM outbox WHERE acked_ns IS NOT NULL AND created_ns < ?",
                                  (acked_before_ns,))
        return int(cursor.rowcount)

    def close(self) -> None:
        self._db.close()
