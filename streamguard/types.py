"""The unit of work: a columnar batch of samples, and the quality codes it carries.

A live micro-batch and a replay chunk are the same type. Order inside a batch is arrival order,
and per tag it is kept: the pipeline walks the batch front to back.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

GOOD = np.uint8(0)
UNCERTAIN = np.uint8(1)
BAD = np.uint8(2)


@dataclass(frozen=True)
class Batch:
    """Samples for the pipeline: ``tag`` indexes the tag table, ``ts`` is int64 ns UTC."""

    tag: np.ndarray  # int32
    ts: np.ndarray  # int64, ns since the epoch, UTC
    value: np.ndarray  # float64
    quality: np.ndarray  # uint8: GOOD / UNCERTAIN / BAD

    def __post_init__(self) -> None:
        # Read-only views throughout: numba compiles one version of a kernel per argument type, and a
        # read-only array (Arrow columns in replay) is a different type from a writable one (decoded live
        # samples). One kind everywhere means one compiled version, cached once, whatever the source.
        for name in ("tag", "ts", "value", "quality"):
            array = getattr(self, name)
            if array.flags.writeable:
                view = array.view()
                view.flags.writeable = False
                object.__setattr__(self, name, view)

    def __len__(self) -> int:
        return int(self.tag.shape[0])

    @classmethod
    def of(cls, tag: object, ts: object, value: object, quality: object | None = None) -> Batch:
        """Build a batch from array-likes, casting to the canonical dtypes."""
        t = np.ascontiguousarray(tag, dtype=np.int32)
        q = (
            np.zeros(t.shape[0], dtype=np.uint8)
            if quality is None
            else np.ascontiguousarray(quality, dtype=np.uint8)
        )
        return cls(
            t,
            np.ascontiguousarray(ts, dtype=np.int64),
            np.ascontiguousarray(value, dtype=np.float64),
            q,
        )

    def slice(self, start: int, stop: int) -> Batch:
        return Batch(self.tag[start:stop], self.ts[start:stop], self.value[start:stop], self.quality[start:stop])
