"""The ``arl`` and ``tune`` subcommands, driven in-process through argparse like the real CLI."""

from __future__ import annotations

import argparse
import io
import json

import pytest
import yaml

from streamguard.config import Detectors
from streamguard.design.commands import register
from streamguard.errors import UsageError


def run(*argv: str) -> str:
    parser = argparse.ArgumentParser(prog="streamguard")
    register(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(list(argv))
    out = io.StringIO()
    assert args.handler(args, out) == 0
    return out.getvalue()


def test_arl_json_gives_the_published_cusum_values() -> None:
    """k = 0.5, h = 4: 168 in control and 8.38 at one sigma (Lucas & Crosier 1982, Table 1)."""
    document = json.loads(run("arl", "cusum", "--k", "0.5", "--h", "4", "--shift", "0,1", "--json"))
    first, second = document["results"]
    assert round(first["arl"]) == 168 and round(second["arl"], 2) == 8.38
    assert document["params"] == {"k": 0.5, "h": 4.0, "headstart": 0.0, "side": "two"}
    assert set(first["quantiles"]) == {"0.05", "0.5", "0.95"}
    assert first["tolerance"] < 1e-3


def test_arl_table_lists_each_shift() -> None:
    """The readable table has a header, one row per shift and the method used."""
    text = run("arl", "shewhart", "--rules", "we1,we2,we3,we4", "--shift", "0,0.5")
    lines = text.splitlines()
    assert "rules=we1,we2,we3,we4" in lines[0]
    assert lines[1].split()[:4] == ["shift", "chart", "shift", "ARL"]
    assert lines[2].split()[2] == "91.75"  # Champ & Woodall (1987)
    assert any(line.startswith("method: exact Markov chain") for line in lines)


def test_arl_subgroup_size_scales_the_shift() -> None:
    """--subgroup-size 4 shows the chart shift 2 * shift and the matching ARL."""
    document = json.loads(run("arl", "ewma", "--lambda", "0.1", "--L", "2.814", "--limits", "asymptotic",
                              "--subgroup-size", "4", "--shift", "0.5", "--json"))  # fmt: skip
    result = document["results"][0]
    assert result["chart_shift"] == pytest.approx(1.0)
    assert result["arl"] == pytest.approx(10.3, abs=0.05 + 0.0103)  # Lucas & Saccucci (1990): 10.3 at 1 sigma


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (("arl", "xbar"), "unknown detector"),
        (("arl", "cusum", "--lambda", "0.2"), "--lambda"),
        (("arl", "cusum", "--k", "half"), "--k"),
        (("arl", "cusum", "--h", "-1"), "cusum.h"),
        (("arl", "ewma", "--limits", "wide"), "ewma.limits"),
        (("arl", "shewhart", "--rules", "we1,we7"), "we7"),
        (("arl", "shewhart", "--run-length", "1"), "run_length"),
        (("arl", "cusum", "--shift", "0,x"), "--shift"),
        (("arl", "cusum", "--subgroup-size", "0"), "--subgroup-size"),
        (("tune", "--false-alarms", "once a month", "--period", "1s", "--shift", "1"), "--false-alarms"),
        (("tune", "--false-alarms", "1/30d", "--period", "1s", "--shift", "-1"), "--shift"),
        (("tune", "--false-alarms", "1/30d", "--period", "1 sec", "--shift", "1"), "--period"),
    ],
)
def test_bad_arguments_raise_usage_errors(argv: tuple[str, ...], message: str) -> None:
    """Each mistake is a UsageError naming what to fix, not a traceback."""
    with pytest.raises(UsageError, match=message):
        run(*argv)


def test_tune_json_round_trips_and_pastes_into_the_config() -> None:
    """Required ARL from the budget arithmetic; every YAML snippet is accepted by the config model."""
    document = json.loads(run("tune", "--false-alarms", "1/1d", "--period", "10s", "--subgroup-size", "6",
                              "--shift", "1", "--within", "30m", "--json"))  # fmt: skip
    assert document["required_in_control_arl"] == pytest.approx(86_400 / 60)
    for option in document["options"]:
        assert option["in_control_arl"] == pytest.approx(document["required_in_control_arl"], rel=1e-3)
        assert option["meets_within"] == (option["detection_delay_s"] <= 1800)
        snippet = yaml.safe_load(option["yaml"])
        assert snippet["subgroup"] == {"size": 6}
        Detectors.model_validate(snippet["detectors"])


def test_tune_text_shows_the_options_and_snippets() -> None:
    """The readable plan names the budget, a row per detector and a pasteable block per feasible option."""
    text = run("tune", "--false-alarms", "1/1d", "--period", "10s", "--shift", "2", "--rules", "we1,we2,we3,we4")
    assert "in-control ARL of 8,640 points" in text
    assert "shewhart  not feasible" in text
    assert "# cusum\ndetectors:\n  cusum:\n" in text and "# ewma\n" in text and "# shewhart\n" not in text
