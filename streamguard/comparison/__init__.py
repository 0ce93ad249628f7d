"""Offline comparison of means: "did the change work?" and "do these two transmitters still agree?".

Off the monitoring path: nothing here runs in the pipeline. ``t_tests`` holds Welch's, the pooled
and the paired t test; ``autocorrelation`` the lag-1 autocorrelation, effective sample size and
block means; ``power`` the detectable difference and required sample size; ``analysis`` puts them
together; ``report`` formats; ``commands`` is the ``streamguard compare`` command.
"""

from .analysis import METHODS, Method, compare_paired, compare_samples, summarise
from .autocorrelation import (
    block_mean_correlation,
    block_means,
    choose_block_length,
    effective_sample_size,
    lag1_autocorrelation,
)
from .pairing import Pairing, pair_nearest
from .power import (
    detectable_difference,
    detectable_noncentrality,
    power_two_sided,
    required_n_paired,
    required_n_two_sample,
)
from .records import (
    BlockSummary,
    EffectSize,
    Equivalence,
    LimitsOfAgreement,
    PairedComparison,
    PairedTest,
    PowerSummary,
    SampleSummary,
    TwoSampleComparison,
    TwoSampleTest,
)
from .report import format_paired, format_two_sample, to_json
from .t_tests import (
    equivalence_test,
    paired_effect_size,
    paired_from_summary,
    paired_test,
    pooled_from_summary,
    pooled_test,
    two_sample_effect_size,
    welch_from_summary,
    welch_test,
)

__all__ = [
    "METHODS",
    "BlockSummary",
    "EffectSize",
    "Equivalence",
    "LimitsOfAgreement",
    "Method",
    "PairedComparison",
    "PairedTest",
    "Pairing",
    "PowerSummary",
    "SampleSummary",
    "TwoSampleComparison",
    "TwoSampleTest",
    "block_mean_correlation",
    "block_means",
    "choose_block_length",
    "compare_paired",
    "compare_samples",
    "detectable_difference",
    "detectable_noncentrality",
    "effective_sample_size",
    "equivalence_test",
    "format_paired",
    "format_two_sample",
    "lag1_autocorrelation",
    "pair_nearest",
    "paired_effect_size",
    "paired_from_summary",
    "paired_test",
    "pooled_from_summary",
    "pooled_test",
    "power_two_sided",
    "required_n_paired",
    "required_n_two_sample",
    "summarise",
    "to_json",
    "two_sample_effect_size",
    "welch_from_summary",
    "welch_test",
]
