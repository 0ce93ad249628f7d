"""The JSONL audit file: one line per event in the replay's schema, appended and flushed as raised.

A line is written before the event's outbox row is committed, so after a crash an event can appear
twice (with the same id), never not at all.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, TextIO


class JsonlSink:
    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._handle: TextIO = self.path.open("a", encoding="utf-8")

    def write(self, records: list[dict[str, Any]]) -> None:
        if not records:
            return
        self._handle.write("".join(json.dumps(r, separators=(",", ":")) + "\n" for r in records))
        self._handle.flush()

    def close(self) -> None:
        self._handle.close()
