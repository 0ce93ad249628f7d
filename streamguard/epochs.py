"""Epoch-number timestamps to int64 nanoseconds UTC: plain numpy, no pyarrow.

Kept apart from ``timestamps.py`` (the historian reader's pyarrow casts) so that the live decoder can
convert epoch timestamps without loading pyarrow, which costs a service tens of MB of resident memory.
"""

from __future__ import annotations

import numpy as np

from streamguard.errors import InputError

TIMESTAMP_FORMATS = ("auto", "iso", "epoch_s", "epoch_ms")

# Epoch magnitudes (common practice): seconds since 1970 stay below 1e11 until the year 5138, and
# milliseconds below 1e14 until the same year, while a present-day millisecond count is above 1e12.
EPOCH_SECONDS_BELOW = 1e11
EPOCH_MILLISECONDS_BELOW = 1e14
NS_PER_UNIT = {"epoch_s": 1_000_000_000, "epoch_ms": 1_000_000}


def epoch_unit_of(numbers: np.ndarray, where: str) -> str:
    """Pick the epoch unit of a file from a sample of its timestamps: the typical (median) magnitude
    decides, so a few values written in the other unit are caught as out of range, not followed."""
    finite = np.abs(numbers[np.isfinite(numbers)])
    return epoch_unit_for(float(np.median(finite)) if finite.size else 0.0, where)


def epoch_unit_for(magnitude: float, where: str) -> str:
    """Pick epoch seconds or milliseconds by magnitude (the ``auto`` rule)."""
    if magnitude < EPOCH_SECONDS_BELOW:
        return "epoch_s"
    if magnitude < EPOCH_MILLISECONDS_BELOW:
        return "epoch_ms"
    raise InputError(
        f"{where}: numeric timestamps up to {magnitude:.4g} are neither epoch seconds (< 1e11) nor "
        "epoch milliseconds (< 1e14); set input.timestamp_format"
    )


def epoch_to_ns(values: np.ndarray, unit: str, *, checked_range: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Epoch numbers to (int64 ns, bad mask).

    The whole and fractional parts are scaled apart, so whole seconds and milliseconds convert exactly
    (a float64 product would round past 2**53 ns). With ``checked_range`` (the ``auto`` format) a value
    too large for the unit picked for the file counts as bad rather than landing centuries away.
    """
    values = np.asarray(values, dtype=np.float64)
    scale = NS_PER_UNIT[unit]
    limit = 9.2e18 / scale
    if checked_range:
        limit = min(limit, EPOCH_SECONDS_BELOW if unit == "epoch_s" else EPOCH_MILLISECONDS_BELOW)
    bad = ~(np.abs(values) < limit)  # also catches NaN
    safe = np.where(bad, 0.0, values)
    whole = np.floor(safe)
    ns = whole.astype(np.int64) * scale + np.rint((safe - whole) * scale).astype(np.int64)
    return ns, bad
