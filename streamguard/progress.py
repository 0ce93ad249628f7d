"""A quiet progress line for long replays: silent for short runs, on stderr only, never in the data."""

from __future__ import annotations

import sys
import time
from typing import TextIO


class Progress:
    """Shows ``rows`` and rate once a run has taken longer than ``delay`` seconds."""

    def __init__(self, total_files: int, stream: TextIO | None = None, delay: float = 2.0,
                 enabled: bool = True) -> None:  # fmt: skip
        self.total_files = total_files
        self.stream = stream if stream is not None else sys.stderr
        self.delay = delay
        self.enabled = enabled
        self.started = time.monotonic()
        self.last_draw = 0.0
        self.rows = 0
        self.files_seen: list[str] = []
        self.shown = False

    def update(self, rows: int, source: str) -> None:
        self.rows += rows
        if source not in self.files_seen:
            self.files_seen.append(source)
        now = time.monotonic()
        if not self.enabled or now - self.started < self.delay or now - self.last_draw < 0.5:
            return
        self.last_draw = now
        done = max(len(self.files_seen) - 1, 0) / max(self.total_files, 1)
        width = 24
        filled = int(done * width)
        bar = "#" * filled + "." * (width - filled)
        rate = self.rows / max(now - self.started, 1e-9)
        self.stream.write(f"\r[{bar}] file {len(self.files_seen)}/{self.total_files}  "
                          f"{self.rows:,} rows  {rate / 1e6:.2f} M rows/s ")  # fmt: skip
        self.stream.flush()
        self.shown = True

    def close(self) -> None:
        if self.shown:
            self.stream.write("\n")
            self.stream.flush()
