"""The frozen result records of the comparison statistics, and their plain-JSON form.

Every number a report prints lives in one of these records; ``to_dict()`` gives the same numbers
for ``--json``. Non-finite floats become ``None`` because JSON has no NaN.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Any


def plain(value: Any) -> Any:
    """Turn a record field into something ``json.dumps`` writes as valid JSON."""
    if hasattr(value, "to_dict"):
        return value.to_dict()
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, int):
        return int(value)
    if isinstance(value, float):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, tuple | list):
        return [plain(item) for item in value]
    if isinstance(value, dict):
        return {str(key): plain(item) for key, item in value.items()}
    try:  # numpy scalars
        return plain(value.item())
    except AttributeError:
        return str(value)


class _Record:
    """Mixin: a frozen dataclass that knows its JSON form."""

    def to_dict(self) -> dict[str, Any]:
        return {field.name: plain(getattr(self, field.name)) for field in fields(self)}  # type: ignore[arg-type]


@dataclass(frozen=True)
class TwoSampleTest(_Record):
    """A two-sample t test of ``mean_first - mean_second``; n may be an effective (non-integer) size."""

    name: str  # "Welch" or "pooled"
    n_first: float
    n_second: float
    mean_first: float
    mean_second: float
    sd_first: float
    sd_second: float
    difference: float
    standard_error: float
    confidence: float
    ci_low: float
    ci_high: float
    t: float
    df: float
    p_value: float


@dataclass(frozen=True)
class PairedTest(_Record):
    """A one-sample t test on paired differences (``first - second`` as in the caller's order)."""

    n: float
    mean_difference: float
    sd_difference: float
    standard_error: float
    confidence: float
    ci_low: float
    ci_high: float
    t: float
    df: float
    p_value: float


@dataclass(frozen=True)
class EffectSize(_Record):
    """Standardised difference, always on the spread of individual samples, not of block means."""

    cohen_d: float
    hedges_g: float
    standardiser: str


@dataclass(frozen=True)
class SampleSummary(_Record):
    """Descriptive statistics of one sample of individual values, in time order."""

    label: str
    n: int
    mean: float
    sd: float
    lag1_autocorrelation: float
    effective_n: float


@dataclass(frozen=True)
class BlockSummary(_Record):
    """How the samples were cut into non-overlapping block means for the ``blocks`` method."""

    block_length: int
    predicted_block_correlation: float  # lag-1 autocorrelation of block means implied by the AR(1) fit
    blocks: tuple[int, ...]  # per sample
    samples_unused: tuple[int, ...]  # the tail of each sample that does not fill a block
    observed_block_correlation: tuple[float, ...]  # lag-1 autocorrelation of the block means, per sample


@dataclass(frozen=True)
class PowerSummary(_Record):
    """Answers "do we have enough data?" for the test that was run."""

    alpha: float
    power: float
    approximation: str
    basis: str
    detectable_difference: float
    threshold: float | None
    power_at_threshold: float | None
    required_independent_n: int | None  # per group (two-sample) or pairs (paired)
    required_samples: int | None  # the same in raw samples at the observed autocorrelation
    required_duration_s: float | None  # the same in time at the median sampling interval


@dataclass(frozen=True)
class LimitsOfAgreement(_Record):
    """Bland & Altman (1986) limits: where most single differences between the two instruments fall."""

    coverage: float
    low: float
    high: float


@dataclass(frozen=True)
class Equivalence(_Record):
    """Two one-sided tests (Schuirmann 1987): is the true difference inside +-margin?

    Shown (``within_margin``) when the (1 - 2 alpha) interval lies inside the margin, i.e. both
    one-sided tests reject at alpha; ``p_value`` is the larger of the two one-sided p-values.
    """

    margin: float
    confidence: float
    ci_low: float
    ci_high: float
    p_value: float
    within_margin: bool


@dataclass(frozen=True)
class TwoSampleComparison(_Record):
    """Two independent samples compared; the difference is ``second - first`` (e.g. after - before)."""

    difference_label: str
    first: SampleSummary
    second: SampleSummary
    method: str
    method_reason: str
    blocks: BlockSummary | None
    welch: TwoSampleTest
    pooled: TwoSampleTest
    effect_size: EffectSize
    equivalence: Equivalence | None
    power: PowerSummary
    notes: tuple[str, ...]


@dataclass(frozen=True)
class PairedComparison(_Record):
    """Aligned pairs compared; the difference is ``second - first`` for each pair."""

    difference_label: str
    first: SampleSummary
    second: SampleSummary
    differences: SampleSummary
    method: str
    method_reason: str
    blocks: BlockSummary | None
    test: PairedTest
    effect_size: EffectSize
    limits_of_agreement: LimitsOfAgreement
    equivalence: Equivalence | None
    power: PowerSummary
    notes: tuple[str, ...]
