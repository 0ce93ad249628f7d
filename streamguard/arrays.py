"""Per-tag columns: the struct-of-arrays that holds every stage's parameters and state.

A stage declares its columns once (name -> dtype, trailing shape, fill value); all tags' values live
in one array per column, indexed by the tag's dense index, grown geometrically as tags appear.
Because state is nothing but these arrays, a checkpoint is a dict of arrays and a restore is exact.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np

ColumnSpec = tuple[type | np.dtype, tuple[int, ...], float | int | bool]


class Columns:
    """A set of per-tag arrays sharing one capacity; subclasses declare ``spec``."""

    spec: ClassVar[dict[str, ColumnSpec]] = {}

    def __init__(self, capacity: int = 16) -> None:
        self.capacity = 0
        self._arrays: dict[str, np.ndarray] = {}
        for name, (dtype, tail, fill) in self.spec.items():
            self._arrays[name] = np.full((0, *tail), fill, dtype=dtype)
        self.ensure(capacity)

    def __getattr__(self, name: str) -> np.ndarray:
        arrays = self.__dict__.get("_arrays")
        if arrays is not None and name in arrays:
            return arrays[name]
        raise AttributeError(name)

    def ensure(self, n: int) -> None:
        """Make room for at least n tags, growing geometrically so that adding tags one by one stays cheap.

        The factor is 1.25, not 2: copies still cost O(1) per tag over time (at most 5 element copies a
        tag), while the slack that is never used stays under a quarter instead of up to a half of the
        memory (with 100,000 tags, doubling from batch-sized steps had reached 192,000 rows).
        """
        if n <= self.capacity:
            return
        new_capacity = max(n, self.capacity + self.capacity // 4, 16)
        for name, (dtype, tail, fill) in self.spec.items():
            old = self._arrays[name]
            new = np.full((new_capacity, *tail), fill, dtype=dtype)
            new[: old.shape[0]] = old
            self._arrays[name] = new
        self.capacity = new_capacity

    def reset(self, index: np.ndarray | int) -> None:
        """Put the given tags back to their initial values."""
        for name, (_dtype, _tail, fill) in self.spec.items():
            self._arrays[name][index] = fill

    def to_dict(self, n: int) -> dict[str, np.ndarray]:
        return {name: self._arrays[name][:n].copy() for name in self.spec}

    def load(self, data: dict[str, np.ndarray], n: int) -> None:
        self.ensure(n)
        for name in self.spec:
            if name in data:
                self._arrays[name][:n] = data[name][:n]

    def nbytes_per_tag(self) -> float:
        return sum(a.nbytes for a in self._arrays.values()) / max(self.capacity, 1)
