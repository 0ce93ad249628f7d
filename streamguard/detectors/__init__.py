"""Detectors: each module holds one published method's parameters, state arrays and compiled kernel.

Every detector reads the same standardized points, z = (mean - mu0) / (sigma0 / sqrt(n)), and writes
per point a signal code (0: in control, else the rule that fired), a direction, the statistic and the
limit it was compared with. The alarm stage turns those signals into raise/clear events.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Signals:
    """One detector's verdict on each point of a batch."""

    code: np.ndarray  # int8: 0 in control, else a rule code of the detector
    direction: np.ndarray  # int8: +1 up, -1 down, 0 none
    statistic: np.ndarray  # float64, in the detector's own units (see its module)
    limit: np.ndarray  # float64, what the statistic was compared with

    @classmethod
    def empty(cls, n: int) -> Signals:
        return cls(np.zeros(n, np.int8), np.zeros(n, np.int8), np.empty(n), np.empty(n))
