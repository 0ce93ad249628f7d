"""Design of detector settings: run-length (ARL) calculation and tuning to a false-alarm budget.

Sits beside the pipeline, not in it: the same standardized points and detector semantics as
``detectors/``, evaluated offline by Markov chains (or seeded simulation where no finite chain exists)
to answer "how often will this raise a false alarm, and how fast will it see a shift?".

    arl("cusum", {"k": 0.5, "h": 4.0}, shift=1.0)            # 8.38 points
    run_length("ewma", {"lambda": 0.1, "L": 2.814}, shift=0.5).quantiles
    tune("1/30d", "1s", shift=0.5)
"""

from .cusum_arl import siegmund_arl
from .engine import DETECTORS, arl, normalise_params, run_length
from .results import RunLength
from .tuning import FalseAlarmBudget, TuningOption, TuningPlan, parse_budget, tune

__all__ = [
    "DETECTORS",
    "FalseAlarmBudget",
    "RunLength",
    "TuningOption",
    "TuningPlan",
    "arl",
    "normalise_params",
    "parse_budget",
    "run_length",
    "siegmund_arl",
    "tune",
]
