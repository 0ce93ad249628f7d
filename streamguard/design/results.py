"""The answer of a run-length calculation, as one small record the commands print and the tuner reads."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

DEFAULT_QUANTILES = (0.05, 0.5, 0.95)


@dataclass(frozen=True)
class RunLength:
    """Run-length properties of one detector setting at one shift.

    ``shift`` is in sigma units of individual values; ``chart_shift`` is the same shift seen by the
    chart's standardized points, shift * sqrt(subgroup size). ``tolerance`` is the estimated relative
    error of ``arl`` (numerical for chains, two standard errors for simulation).
    """

    detector: str
    shift: float
    chart_shift: float
    arl: float
    tolerance: float
    method: str
    sdrl: float | None = None
    quantiles: dict[float, int] = field(default_factory=dict)
    steady_state_arl: float | None = None
    standard_error: float | None = None
    notes: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {
            "detector": self.detector,
            "shift": self.shift,
            "chart_shift": self.chart_shift,
            "arl": self.arl,
            "tolerance": self.tolerance,
            "sdrl": self.sdrl,
            "quantiles": {f"{q:g}": t for q, t in self.quantiles.items()},
            "steady_state_arl": self.steady_state_arl,
            "standard_error": self.standard_error,
            "method": self.method,
            "notes": list(self.notes),
        }
