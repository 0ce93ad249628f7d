"""Single timestamps written by people (config windows, command-line times) to int64 ns UTC.

Bulk timestamps in historian files are parsed by the reader with pyarrow; this is for the odd one.
"""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np

_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)


def parse_time(text: str | datetime) -> int:
    """ISO 8601 with 'Z' or an offset; a naive time is taken as UTC. Returns ns since the epoch."""
    if isinstance(text, datetime):
        moment = text
    else:
        try:
            moment = datetime.fromisoformat(str(text).strip())
        except ValueError:
            raise ValueError(f"{text!r} is not an ISO 8601 time (e.g. 2026-03-02T00:00:00Z)") from None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    delta = moment - _EPOCH
    return (delta.days * 86400 + delta.seconds) * 1_000_000_000 + delta.microseconds * 1000


def format_time(ns: int) -> str:
    """ISO 8601 UTC with 'Z', fractional digits only as many as the value needs."""
    text = str(np.datetime64(int(ns), "ns"))
    if "." in text:
        head, frac = text.split(".")
        frac = frac.rstrip("0")
        text = f"{head}.{frac}" if frac else head
    return text + "Z"
