"""The two questions asked of historian data offline, answered with autocorrelation taken into account.

"Did the change work?" compares two independent stretches of one tag (or two tags) with Welch's
test; "do these two transmitters still agree?" compares time-aligned pairs with the paired test.
Both pick how to handle serial correlation (``method``), say why in words, and add the power
answer. Inputs are plain value arrays in time order; reading files and aligning pairs happen in
``series`` and ``pairing``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import special

from .autocorrelation import (
    block_mean_correlation,
    block_means,
    choose_block_length,
    effective_sample_size,
    lag1_autocorrelation,
)
from .power import (
    APPROXIMATION,
    detectable_difference,
    power_two_sided,
    required_n_paired,
    required_n_two_sample,
)
from .records import (
    BlockSummary,
    LimitsOfAgreement,
    PairedComparison,
    PowerSummary,
    SampleSummary,
    TwoSampleComparison,
)
from .t_tests import (
    equivalence_test,
    paired_effect_size,
    paired_from_summary,
    pooled_from_summary,
    two_sample_effect_size,
    welch_from_summary,
)

Method = Literal["blocks", "effective_n", "naive"]
METHODS: tuple[Method, ...] = ("blocks", "effective_n", "naive")

# Block means whose lag-1 correlation is rho understate the variance of their grand mean by about
# 2 rho; 0.025 keeps that under 5 %, i.e. the standard error within 2.5 % (derived in the docs of
# block_mean_correlation; the threshold itself is a choice).
BLOCK_CORRELATION_TARGET = 0.025
# Fewer batches than this make the variance estimate itself too rough (10 to 30 batches: Schmeiser
# 1982, from memory).
MINIMUM_BLOCKS = 10
# Above this lag-1 autocorrelation the naive test is flagged (common practice, not a sharp limit).
AUTOCORRELATION_NOTICE = 0.1


def summarise(values: ArrayLike, label: str) -> SampleSummary:
    """n, mean, SD, lag-1 autocorrelation and effective n of one sample in time order."""
    x = np.asarray(values, dtype=np.float64)
    n = int(x.shape[0])
    if n < 2:
        raise ValueError(f"{label}: a comparison needs at least 2 values, got {n}")
    lag1 = lag1_autocorrelation(x)
    return SampleSummary(
        label=label,
        n=n,
        mean=float(x.mean()),
        sd=float(x.std(ddof=1)),
        lag1_autocorrelation=lag1,
        effective_n=effective_sample_size(n, lag1),
    )


def _persistence(*lag1_values: float) -> float:
    """The AR(1) coefficient used for design: the largest positive lag-1 autocorrelation seen."""
    finite = [value for value in lag1_values if math.isfinite(value)]
    return max([0.0, *finite])


def _check_settings(method: str, alpha: float, power: float, confidence: float | None) -> float:
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}, not {method!r}")
    if not 0.0 < alpha < 0.5:
        raise ValueError(f"alpha must be between 0 and 0.5, not {alpha}")
    if not 0.0 < power < 1.0:
        raise ValueError(f"power must be between 0 and 1, not {power}")
    level = 1.0 - alpha if confidence is None else confidence
    if not 0.0 < level < 1.0:
        raise ValueError(f"confidence must be between 0 and 1, not {level}")
    return level


def _plan_blocks(phi: float, shortest: int) -> tuple[int, bool]:
    """Block length from the AR(1) fit, shortened if it would leave fewer than MINIMUM_BLOCKS blocks."""
    wanted = choose_block_length(phi, BLOCK_CORRELATION_TARGET)
    allowed = max(1, shortest // MINIMUM_BLOCKS)
    return (wanted, False) if wanted <= allowed else (allowed, True)


def _white_noise_bound(count: int) -> float:
    """About 2/sqrt(m): lag-1 autocorrelations of m independent values stay inside it 95 % of the time
    (Bartlett's large-sample standard error 1/sqrt(m); common practice in ACF plots)."""
    return 2.0 / math.sqrt(count) if count > 0 else math.inf


def _block_notes(blocks: BlockSummary, labels: Sequence[str], shortened: bool, phi: float) -> list[str]:
    notes = []
    if shortened:
        wanted = choose_block_length(phi, BLOCK_CORRELATION_TARGET)
        notes.append(
            f"the AR(1) fit (r1 = {phi:.3f}) wants blocks of {wanted} samples, but that leaves fewer than"
            f" {MINIMUM_BLOCKS} blocks; blocks of {blocks.block_length} are used, their means are still"
            f" correlated (about {blocks.predicted_block_correlation:.2f}), so the p-value is optimistic:"
            " compare longer windows"
        )
    for label, count, observed in zip(labels, blocks.blocks, blocks.observed_block_correlation, strict=True):
        bound = _white_noise_bound(count)
        if math.isfinite(observed) and observed > bound:
            notes.append(
                f"{label}: the block means are still autocorrelated (lag-1 {observed:.2f} over {count}"
                f" blocks, above 2/sqrt({count}) = {bound:.2f}); slow drift or cycles longer than a block"
                " do not fit the AR(1) model: treat the p-value as optimistic"
            )
    return notes


@dataclass(frozen=True)
class _Prepared:
    """What a method hands to the t test: (mean, sd, n) per series, and how it got there."""

    inputs: tuple[tuple[float, float, float], ...]
    reason: str
    blocks: BlockSummary | None
    notes: tuple[str, ...]


def _prepare(
    method: str, series: Sequence[np.ndarray], summaries: Sequence[SampleSummary], phi: float
) -> _Prepared:
    """Apply the serial-correlation method to each series (two samples, or one series of differences)."""
    labels = [summary.label for summary in summaries]
    notes: list[str] = []
    if method == "naive":
        inputs = tuple((s.mean, s.sd, float(s.n)) for s in summaries)
        if phi > AUTOCORRELATION_NOTICE:
            counts = " and ".join(f"{s.n} ({s.label})" for s in summaries)
            independent = " and ".join(f"{s.effective_n:.0f}" for s in summaries)
            notes.append(
                f"lag-1 autocorrelation up to {phi:.2f}: the naive test counts {counts} values where about"
                f" {independent} are independent, so its p-value is too small; use blocks or effective_n"
            )
        reason = "every value counted as independent (right only when lag-1 autocorrelation is near zero)"
        return _Prepared(inputs, reason, None, tuple(notes))
    if method == "effective_n":
        inputs = tuple((s.mean, s.sd, s.effective_n) for s in summaries)
        shrinkage = "; ".join(
            f"{s.label} {s.n} -> {s.effective_n:.1f} (r1 = {s.lag1_autocorrelation:.3f})" for s in summaries
        )
        reason = (
            "t test with effective sizes n (1 - r1)/(1 + r1) (AR(1) approximation,"
            " Bayley & Hammersley 1946): " + shrinkage
        )
        if min(s.effective_n for s in summaries) < 10:
            notes.append("fewer than 10 effective values in a series: the AR(1) correction is rough here")
        return _Prepared(inputs, reason, None, tuple(notes))
    block_length, shortened = _plan_blocks(phi, min(s.n for s in summaries))
    means = [block_means(values, block_length) for values in series]
    if min(m.shape[0] for m in means) < 2:
        raise ValueError("too few values to form two blocks per series")
    blocks = BlockSummary(
        block_length=block_length,
        predicted_block_correlation=block_mean_correlation(block_length, phi),
        blocks=tuple(int(m.shape[0]) for m in means),
        samples_unused=tuple(s.n % block_length for s in summaries),
        observed_block_correlation=tuple(lag1_autocorrelation(m) for m in means),
    )
    inputs = tuple((float(m.mean()), float(m.std(ddof=1)), float(m.shape[0])) for m in means)
    if block_length == 1:
        reason = (
            f"lag-1 autocorrelation at most {phi:.3f} (<= {BLOCK_CORRELATION_TARGET}): values are nearly"
            " independent already, so blocks of 1 (the plain t test)"
        )
    else:
        reason = (
            f"t test on means of non-overlapping blocks of {block_length} values"
            f" ({' and '.join(str(count) for count in blocks.blocks)} blocks): for an AR(1) series with the"
            f" largest lag-1 autocorrelation seen ({phi:.3f}), means of such blocks are correlated at"
            f" {blocks.predicted_block_correlation:.3f} (target <= {BLOCK_CORRELATION_TARGET}), so they are"
            " treated as independent"
        )
    return _Prepared(inputs, reason, blocks, tuple(_block_notes(blocks, labels, shortened, phi)))


def _raw_samples_for(
    independent: int | None, method: str, phi: float, block_length: int | None
) -> int | None:
    """Convert a required count of independent values into raw samples at the observed autocorrelation."""
    if independent is None:
        return None
    if method == "blocks" and block_length is not None:
        return independent * block_length
    if method == "effective_n":
        return math.ceil(independent / effective_sample_size(1.0, phi))
    return independent


def _power_summary(
    *,
    standard_error: float,
    df: float,
    alpha: float,
    power: float,
    threshold: float | None,
    required: int | None,
    method: str,
    phi: float,
    block_length: int | None,
    sample_interval_s: float | None,
    basis: str,
) -> PowerSummary:
    detectable = detectable_difference(standard_error, df, alpha, power) if standard_error > 0 else 0.0
    power_now = None
    if threshold is not None:
        power_now = power_two_sided(abs(threshold) / standard_error, df, alpha) if standard_error > 0 else 1.0
    raw = _raw_samples_for(required, method, phi, block_length)
    duration = raw * sample_interval_s if raw is not None and sample_interval_s is not None else None
    return PowerSummary(
        alpha=alpha,
        power=power,
        approximation=APPROXIMATION,
        basis=basis,
        detectable_difference=detectable,
        threshold=threshold,
        power_at_threshold=power_now,
        required_independent_n=required,
        required_samples=raw,
        required_duration_s=duration,
    )


def compare_samples(
    first: ArrayLike,
    second: ArrayLike,
    *,
    labels: tuple[str, str] = ("first", "second"),
    method: Method = "blocks",
    alpha: float = 0.05,
    power: float = 0.8,
    confidence: float | None = None,
    threshold: float | None = None,
    sample_interval_s: float | None = None,
) -> TwoSampleComparison:
    """Welch's test of ``mean(second) - mean(first)`` for two independent stretches in time order.

    ``confidence`` defaults to 1 - alpha so the interval and the test agree. ``threshold`` is the
    practical difference in engineering units; with it come the power to detect it now, the
    sample size needed, and the two one-sided tests for "the change is smaller than that".
    """
    level = _check_settings(method, alpha, power, confidence)
    a = np.asarray(first, dtype=np.float64)
    b = np.asarray(second, dtype=np.float64)
    summary_a, summary_b = summarise(a, labels[0]), summarise(b, labels[1])
    phi = _persistence(summary_a.lag1_autocorrelation, summary_b.lag1_autocorrelation)
    prepared = _prepare(method, (a, b), (summary_a, summary_b), phi)
    block_length = prepared.blocks.block_length if prepared.blocks is not None else None
    (mean_a, sd_a, n_a), (mean_b, sd_b, n_b) = prepared.inputs
    welch = welch_from_summary(mean_b, sd_b, n_b, mean_a, sd_a, n_a, confidence=level)
    pooled = pooled_from_summary(mean_b, sd_b, n_b, mean_a, sd_a, n_a, confidence=level)
    effect = two_sample_effect_size(
        summary_b.mean, summary_b.sd, summary_b.n, summary_a.mean, summary_a.sd, summary_a.n
    )
    equivalence = None
    if threshold is not None:
        equivalence = equivalence_test(
            welch.difference, welch.standard_error, welch.df, abs(threshold), alpha
        )
    design_sd = math.sqrt((sd_a**2 + sd_b**2) / 2.0)
    required = required_n_two_sample(threshold, design_sd, alpha, power) if threshold is not None else None
    unit = f"means of {block_length}-sample blocks" if method == "blocks" else "independent samples"
    basis = (
        f"Welch SE and df of this test; sample size per group of {unit}, equal groups, SD {design_sd:.4g}"
        " (root mean square of the two)"
    )
    power_summary = _power_summary(
        standard_error=welch.standard_error, df=welch.df, alpha=alpha, power=power, threshold=threshold,
        required=required, method=method, phi=phi, block_length=block_length,
        sample_interval_s=sample_interval_s, basis=basis,
    )  # fmt: skip
    return TwoSampleComparison(
        difference_label=f"{labels[1]} - {labels[0]}",
        first=summary_a,
        second=summary_b,
        method=method,
        method_reason=prepared.reason,
        blocks=prepared.blocks,
        welch=welch,
        pooled=pooled,
        effect_size=effect,
        equivalence=equivalence,
        power=power_summary,
        notes=prepared.notes,
    )


def compare_paired(
    first: ArrayLike,
    second: ArrayLike,
    *,
    labels: tuple[str, str] = ("first", "second"),
    method: Method = "blocks",
    alpha: float = 0.05,
    power: float = 0.8,
    confidence: float | None = None,
    threshold: float | None = None,
    sample_interval_s: float | None = None,
) -> PairedComparison:
    """Paired test of ``second - first`` on aligned values; serial correlation handled on the differences."""
    level = _check_settings(method, alpha, power, confidence)
    a = np.asarray(first, dtype=np.float64)
    b = np.asarray(second, dtype=np.float64)
    if a.shape != b.shape:
        raise ValueError(f"paired samples must have the same length ({a.shape[0]} vs {b.shape[0]})")
    differences = b - a
    summary_a, summary_b = summarise(a, labels[0]), summarise(b, labels[1])
    summary_d = summarise(differences, f"{labels[1]} - {labels[0]}")
    phi = _persistence(summary_d.lag1_autocorrelation)
    prepared = _prepare(method, (differences,), (summary_d,), phi)
    block_length = prepared.blocks.block_length if prepared.blocks is not None else None
    ((mean, sd, n),) = prepared.inputs
    test = paired_from_summary(mean, sd, n, confidence=level)
    effect = paired_effect_size(summary_d.mean, summary_d.sd, summary_d.n)
    z = float(special.ndtri(0.975))
    agreement = LimitsOfAgreement(0.95, summary_d.mean - z * summary_d.sd, summary_d.mean + z * summary_d.sd)
    equivalence = None
    if threshold is not None:
        equivalence = equivalence_test(
            test.mean_difference, test.standard_error, test.df, abs(threshold), alpha
        )
    required = required_n_paired(threshold, sd, alpha, power) if threshold is not None else None
    unit = f"means of {block_length}-pair blocks" if method == "blocks" else "independent pairs"
    basis = f"SE and df of this test; number of {unit} needed, SD of the differences {sd:.4g}"
    power_summary = _power_summary(
        standard_error=test.standard_error, df=test.df, alpha=alpha, power=power, threshold=threshold,
        required=required, method=method, phi=phi, block_length=block_length,
        sample_interval_s=sample_interval_s, basis=basis,
    )  # fmt: skip
    return PairedComparison(
        difference_label=summary_d.label,
        first=summary_a,
        second=summary_b,
        differences=summary_d,
        method=method,
        method_reason=prepared.reason,
        blocks=prepared.blocks,
        test=test,
        effect_size=effect,
        limits_of_agreement=agreement,
        equivalence=equivalence,
        power=power_summary,
        notes=prepared.notes,
    )
