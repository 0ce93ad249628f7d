"""Plain-text tables and JSON documents for comparison results, for a terminal or a ticket.

The text is for people: numbers rounded to what matters, the method and its reason spelled out,
notes last. The JSON carries every number unrounded (``to_dict`` of the records).
"""

from __future__ import annotations

import json
import math
import textwrap
from collections.abc import Sequence
from typing import Any

from ..durations import format_duration
from .records import (
    BlockSummary,
    Equivalence,
    PairedComparison,
    PowerSummary,
    SampleSummary,
    TwoSampleComparison,
)

_WIDTH = 100
_LABEL = 28


def number(value: float | None, digits: int = 5) -> str:
    """A value to ``digits`` significant figures; 'n/a' for missing or undefined."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    if isinstance(value, float) and math.isinf(value):
        return "inf" if value > 0 else "-inf"
    return f"{value:.{digits}g}"


def p_value(value: float) -> str:
    if math.isnan(value):
        return "n/a"
    if value < 1e-300:  # below what a double resolves in the t tail: say so rather than print 0
        return "< 1e-300"
    return f"{value:.2e}" if value < 1e-4 else f"{value:.4f}"


def _percent(fraction: float) -> str:
    return f"{fraction * 100:.4g} %"


def _row(label: str, *cells: str) -> str:
    return f"  {label:<{_LABEL}}" + "".join(f"{cell:>16}" for cell in cells)


def _wrapped(label: str, text: str) -> list[str]:
    return textwrap.wrap(text, _WIDTH, initial_indent=f"{label}", subsequent_indent=" " * len(label)) or [
        label
    ]


def _sample_rows(samples: Sequence[SampleSummary]) -> list[str]:
    return [
        _row("", *(sample.label for sample in samples)),
        _row("n", *(str(sample.n) for sample in samples)),
        _row("mean", *(number(sample.mean, 6) for sample in samples)),
        _row("standard deviation", *(number(sample.sd, 4) for sample in samples)),
        _row("lag-1 autocorrelation", *(number(sample.lag1_autocorrelation, 3) for sample in samples)),
        _row("effective n (AR(1))", *(f"{sample.effective_n:.1f}" for sample in samples)),
    ]


def _block_lines(blocks: BlockSummary | None) -> list[str]:
    if blocks is None or blocks.block_length == 1:
        return []
    observed = ", ".join(number(value, 2) for value in blocks.observed_block_correlation)
    unused = ", ".join(str(count) for count in blocks.samples_unused)
    return _wrapped(
        "  ",
        f"blocks of {blocks.block_length}: {', '.join(str(count) for count in blocks.blocks)} blocks;"
        f" lag-1 autocorrelation of block means predicted {number(blocks.predicted_block_correlation, 2)},"
        f" observed {observed}; tail samples not used: {unused}",
    )


def _equivalence_lines(equivalence: Equivalence | None) -> list[str]:
    if equivalence is None:
        return []
    verdict = "yes" if equivalence.within_margin else "not shown"
    return _wrapped(
        "  ",
        f"equivalence within +-{number(equivalence.margin)} (two one-sided tests):"
        f" {_percent(equivalence.confidence)} CI {number(equivalence.ci_low)} .."
        f" {number(equivalence.ci_high)}, p = {p_value(equivalence.p_value)}; within margin: {verdict}",
    )


def _power_lines(power: PowerSummary) -> list[str]:
    lines = [
        f"enough data? (alpha {power.alpha:g}, power {power.power:g}; {power.approximation})",
        _row("detectable difference now", number(power.detectable_difference, 4)),
    ]
    if power.threshold is not None:
        lines.append(_row(f"power now at {number(power.threshold, 4)}", number(power.power_at_threshold, 3)))
        if power.required_independent_n is None:
            needed = "n/a"
        else:
            needed = f"{power.required_independent_n} independent"
            if power.required_samples is not None and power.required_samples != power.required_independent_n:
                needed += f" -> {power.required_samples} samples"
            if power.required_duration_s is not None:
                needed += f" -> {format_duration(power.required_duration_s * 1e9)}"
        lines.append(f"  {'needed to detect it':<{_LABEL}}{needed:>16}")
    lines.extend(_wrapped("  basis: ", power.basis))
    return lines


def _test_line(name: str, t: float, df: float, p: float) -> str:
    return f"  {name:<8} t = {number(t, 4):<10} df = {number(df, 4):<10} p = {p_value(p)}"


def _note_lines(notes: Sequence[str]) -> list[str]:
    if not notes:
        return []
    lines = ["notes"]
    for note in notes:
        lines.extend(_wrapped("  - ", note))
    return lines


def format_two_sample(result: TwoSampleComparison, header: Sequence[str] = ()) -> str:
    """The table for a two-sample comparison; ``header`` lines (inputs, windows) go first."""
    welch, pooled = result.welch, result.pooled
    effect = result.effect_size
    lines = [*header, *_sample_rows((result.first, result.second)), ""]
    lines.extend(_wrapped(f"method {result.method}: ", result.method_reason))
    lines.extend(_block_lines(result.blocks))
    lines.append("")
    lines.append(
        f"difference ({result.difference_label}) {number(welch.difference)}"
        f"   {_percent(welch.confidence)} CI {number(welch.ci_low)} .. {number(welch.ci_high)} (Welch)"
    )
    for test in (welch, pooled):
        lines.append(_test_line(test.name, test.t, test.df, test.p_value))
    lines.append(
        f"  effect size: Cohen's d = {number(effect.cohen_d, 3)}, Hedges' g = {number(effect.hedges_g, 3)}"
        " (on the pooled SD of individual samples)"
    )
    lines.extend(_equivalence_lines(result.equivalence))
    lines.append("")
    lines.extend(_power_lines(result.power))
    lines.extend(_note_lines(result.notes))
    return "\n".join(lines) + "\n"


def format_paired(result: PairedComparison, header: Sequence[str] = ()) -> str:
    """The table for a paired comparison; ``header`` lines (inputs, pairing) go first."""
    test = result.test
    effect = result.effect_size
    agreement = result.limits_of_agreement
    lines = [*header, *_sample_rows((result.first, result.second, result.differences)), ""]
    lines.extend(_wrapped(f"method {result.method}: ", result.method_reason))
    lines.extend(_block_lines(result.blocks))
    lines.append("")
    lines.append(
        f"mean difference ({result.difference_label}) {number(test.mean_difference)}"
        f"   {_percent(test.confidence)} CI {number(test.ci_low)} .. {number(test.ci_high)}"
    )
    lines.append(_test_line("paired", test.t, test.df, test.p_value))
    lines.append(
        f"  effect size: Cohen's d_z = {number(effect.cohen_d, 3)}, Hedges' g = {number(effect.hedges_g, 3)}"
        " (on the SD of individual differences)"
    )
    lines.append(
        f"  limits of agreement ({_percent(agreement.coverage)} of single differences, Bland & Altman):"
        f" {number(agreement.low)} .. {number(agreement.high)}"
    )
    lines.extend(_equivalence_lines(result.equivalence))
    lines.append("")
    lines.extend(_power_lines(result.power))
    lines.extend(_note_lines(result.notes))
    return "\n".join(lines) + "\n"


def to_json(document: dict[str, Any]) -> str:
    """Strict JSON (no NaN): records are already plain through their ``to_dict``."""
    return json.dumps(document, indent=2, allow_nan=False) + "\n"
