"""The engine's public entry points: parameter names and defaults of the config, validation, results."""

from __future__ import annotations

import pytest

from streamguard.config import CusumParams, EwmaParams, ShewhartParams
from streamguard.design import arl, normalise_params, run_length
from streamguard.errors import UsageError


def test_defaults_are_the_configs_defaults() -> None:
    """An empty parameter dict means the config's defaults (streamguard.config models)."""
    assert normalise_params("cusum", {}) | {"side": "two"} == CusumParams().model_dump() | {"side": "two"}
    ewma = EwmaParams()
    assert normalise_params("ewma", {}) == {"lambda": ewma.lambda_, "L": ewma.L, "limits": ewma.limits}
    shewhart = ShewhartParams()
    assert normalise_params("shewhart", {}) == {"limit": shewhart.limit, "rules": shewhart.rules,
                                                "run_length": shewhart.run_length}  # fmt: skip


def test_config_models_are_accepted_directly() -> None:
    """A validated config model (aliases and all) can be handed over as it is."""
    model = EwmaParams.model_validate({"lambda": 0.1, "L": 2.814, "limits": "asymptotic"})
    assert arl("ewma", model) == arl("ewma", {"lambda": 0.1, "L": 2.814, "limits": "asymptotic"})


@pytest.mark.parametrize(
    ("detector", "params", "message"),
    [
        ("cusum", {"k": -0.1}, "cusum.k"),
        ("cusum", {"headstart": 1.0}, "cusum.headstart"),
        ("cusum", {"gamma": 1.0}, "unknown parameter"),
        ("ewma", {"lambda": 0.0}, "ewma.lambda"),
        ("ewma", {"L": "wide"}, "ewma.L"),
        ("shewhart", {"rules": []}, "at least one rule"),
        ("shewhart", {"run_length": 16}, "run_length"),
        ("xbar", {}, "unknown detector"),
    ],
)
def test_bad_parameters_name_the_key(detector: str, params: dict, message: str) -> None:
    """Mistakes come back as UsageError with the detector and key in the message."""
    with pytest.raises(UsageError, match=message):
        arl(detector, params)


def test_bad_subgroup_size_is_refused() -> None:
    with pytest.raises(UsageError, match="subgroup size"):
        arl("cusum", {}, 1.0, subgroup_size=0)


def test_result_carries_method_and_tolerance() -> None:
    """run_length reports what produced the numbers and how precise the ARL is."""
    result = run_length("cusum", {"k": 0.5, "h": 4.0}, shift=1.0, quantiles=(0.1, 0.9))
    assert result.arl == pytest.approx(8.38, abs=0.005 + 0.0084)  # Lucas & Crosier (1982), Table 1
    assert result.tolerance < 1e-3
    assert set(result.quantiles) == {0.1, 0.9} and result.quantiles[0.1] < result.quantiles[0.9]
    assert "Brook & Evans" in result.method
    assert result.to_dict()["quantiles"] == {"0.1": result.quantiles[0.1], "0.9": result.quantiles[0.9]}


def test_large_decision_interval_skips_two_dimensional_extras_with_a_note() -> None:
    """Beyond the cheap size of the 2-D chain, SDRL and quantiles are left out and the note says why."""
    result = run_length("cusum", {"k": 0.25, "h": 33.0}, shift=0.0)
    assert result.sdrl is None and result.quantiles == {}
    assert any("two-dimensional" in note for note in result.notes)
    one_sided = run_length("cusum", {"k": 0.25, "h": 40.0, "side": "upper"}, shift=0.0)
    assert one_sided.sdrl is not None and one_sided.quantiles
