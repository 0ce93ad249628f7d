"""Durations written the way people write them in config files: "90s", "5m", "2h", "30d".

Everything inside the pipeline is int64 nanoseconds; this is the one place text becomes a number.
"""

from __future__ import annotations

import re

_UNITS_NS = {
    "ms": 1_000_000,
    "s": 1_000_000_000,
    "m": 60 * 1_000_000_000,
    "h": 3600 * 1_000_000_000,
    "d": 86400 * 1_000_000_000,
}
_PATTERN = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(ms|s|m|h|d)\s*$")


def parse_duration(text: str) -> int:
    """Return the duration in nanoseconds; raise ValueError with the accepted forms otherwise."""
    match = _PATTERN.match(str(text))
    if not match:
        raise ValueError(f"{text!r} is not a duration; write a number and a unit: ms, s, m, h or d (e.g. '90s', '5m')")
    number, unit = match.groups()
    ns = round(float(number) * _UNITS_NS[unit])
    if ns <= 0:
        raise ValueError(f"{text!r}: a duration must be greater than zero")
    return ns


def format_duration(ns: float) -> str:
    """A short human reading of a duration, choosing the largest unit that keeps it >= 1."""
    seconds = ns / 1e9
    for unit, size in (("d", 86400.0), ("h", 3600.0), ("min", 60.0), ("s", 1.0)):
        if seconds >= size:
            return f"{seconds / size:.3g} {unit}"
    return f"{seconds * 1000:.3g} ms"
