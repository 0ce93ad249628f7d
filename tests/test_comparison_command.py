"""``streamguard compare`` run in-process on small long-format CSV files written with pyarrow.

The data are invented for these checks (a 1 s tag with a known step, two instruments with a known
scale and offset); what is checked is that the command finds what was put in, uses only GOOD finite
samples, and refuses bad arguments with a UsageError naming the option.
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pytest
from scipy.signal import lfilter

from streamguard.comparison.commands import register
from streamguard.errors import InputError, UsageError

START = np.datetime64("2026-03-02T00:00:00", "s")
CHANGE = "2026-03-02T01:00:00Z"
GOOD, BAD = "good", "bad"  # quality words, which the reader decodes without an encoding setting


def iso(seconds: np.ndarray) -> list[str]:
    return [str(START + np.timedelta64(int(s), "s")) + "Z" for s in seconds]


def write_long_csv(
    path: Path, timestamps: list[str], tags: list[str], values: np.ndarray, quality: np.ndarray
) -> Path:
    table = pa.table(
        {
            "timestamp": pa.array(timestamps, pa.string()),
            "tag": pa.array(tags, pa.string()),
            "value": pa.array(values, pa.float64()),
            "quality": pa.array(quality.tolist()),
        }
    )
    pacsv.write_csv(table, path)
    return path


def run(argv: list[str], capsys: pytest.CaptureFixture[str]) -> str:
    parser = argparse.ArgumentParser(prog="streamguard")
    register(parser.add_subparsers(dest="command"))
    args = parser.parse_args(argv)
    assert args.handler(args) == 0
    return capsys.readouterr().out


@pytest.fixture
def step_file(tmp_path: Path) -> Path:
    """Two hours of a 1 s tag, AR(1) noise (phi 0.6, SD 0.1); +0.5 from 01:00Z; bad-quality spikes."""
    rng = np.random.default_rng(3)
    seconds = np.arange(7200)
    noise = lfilter([1.0], [1.0, -0.6], rng.normal(0.0, 0.08, seconds.shape[0]))
    values = 20.0 + noise + np.where(seconds >= 3600, 0.5, 0.0)
    quality = np.full(seconds.shape[0], GOOD, dtype=object)
    spikes = rng.choice(seconds.shape[0], 40, replace=False)
    values[spikes] = 1e6  # a disowned value that would wreck the mean if it were used
    quality[spikes] = BAD
    values[5] = math.nan  # good quality but not a number
    return write_long_csv(tmp_path / "step.csv", iso(seconds), ["TI-100"] * seconds.shape[0], values, quality)


def test_before_after_finds_the_step_and_ignores_bad_samples(
    step_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The 0.5 step lies inside the 95 % interval; the 40 bad spikes and one NaN are counted, not used."""
    out = run(
        ["compare", "before-after", "--tag", "TI-100", "--at", CHANGE, "--json", str(step_file)], capsys
    )
    document = json.loads(out)
    result = document["result"]
    assert result["method"] == "blocks"
    assert result["welch"]["ci_low"] < 0.5 < result["welch"]["ci_high"]
    assert result["welch"]["p_value"] < 1e-6
    inputs = document["inputs"]
    assert inputs[0]["not_good"] + inputs[1]["not_good"] == 40
    assert (inputs[0]["not_finite"], inputs[1]["not_finite"]) == (1, 0)
    assert inputs[0]["used"] + inputs[1]["used"] == 7200 - 40 - 1
    assert inputs[0]["rows"] == inputs[1]["rows"] == 3600


def test_before_after_windows_and_span_agree(step_file: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """--at with --span 30m is the same comparison as the two explicit 30-minute windows."""
    at = json.loads(run(["compare", "before-after", "--tag", "TI-100", "--at", CHANGE, "--span", "30m",
                         "--json", str(step_file)], capsys))  # fmt: skip
    before = "2026-03-02T00:30:00Z..2026-03-02T01:00:00Z"
    after = "2026-03-02T01:00:00+00:00..2026-03-02T01:30:00Z"  # an offset is as good as Z
    argv = ["compare", "before-after", "--tag", "TI-100", "--before", before, "--after", after, "--json"]
    windows = json.loads(run([*argv, str(step_file)], capsys))
    assert at["result"]["welch"] == windows["result"]["welch"]
    assert at["inputs"][0]["window"] == {"start": "2026-03-02T00:30:00Z", "end": "2026-03-02T01:00:00Z"}


def test_before_after_table_names_method_and_power(
    step_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The plain-text report says which method ran, why, and answers the data question for a threshold."""
    out = run(["compare", "before-after", "--tag", "TI-100", "--at", CHANGE, "--threshold", "0.05",
               "--method", "effective_n", str(step_file)], capsys)  # fmt: skip
    assert "method effective_n" in out
    assert "Bayley" in out  # the source of the correction is named
    assert "detectable difference now" in out
    assert "needed to detect it" in out


@pytest.fixture
def twin_file(tmp_path: Path) -> Path:
    """Two transmitters on one line: FT-2 reads (truth - 1)/2 (scale 2, offset 1 restores it), 0.4 s late,
    missing every 50th sample."""
    rng = np.random.default_rng(4)
    seconds = np.arange(3000)
    truth = 50.0 + lfilter([1.0], [1.0, -0.9], rng.normal(0.0, 0.5, seconds.shape[0]))
    first = truth + rng.normal(0.0, 0.05, seconds.shape[0])
    second = (truth + 0.02 + rng.normal(0.0, 0.05, seconds.shape[0]) - 1.0) / 2.0
    keep = seconds % 50 != 7
    stamps = iso(seconds) + [
        str(START + np.timedelta64(int(s) * 1000 + 400, "ms")) + "Z" for s in seconds[keep]
    ]
    tags = ["FT-1"] * seconds.shape[0] + ["FT-2"] * int(keep.sum())
    values = np.concatenate([first, second[keep]])
    return write_long_csv(
        tmp_path / "twins.csv", stamps, tags, values, np.full(values.shape[0], GOOD, dtype=object)
    )


def test_paired_restores_scale_and_offset_and_counts_unmatched(
    twin_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """With scale 2 and offset 1 the mean difference is the planted 0.02 (in the CI); 60 of FT-1 unmatched."""
    argv = ["compare", "paired", "--tag", "FT-1", "--tag", "FT-2", "--tolerance", "1s", "--scale", "2"]
    document = json.loads(run([*argv, "--offset", "1", "--json", str(twin_file)], capsys))
    pairing = document["pairing"]
    assert pairing["pairs"] == 3000 - 60
    assert pairing["unmatched_first"] == 60 and pairing["unmatched_second"] == 0
    assert pairing["median_offset_s"] == pytest.approx(0.4)
    test = document["result"]["test"]
    assert test["ci_low"] < 0.02 < test["ci_high"]


def test_tags_form_compares_two_tags_over_a_window(
    twin_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Unscaled FT-2 sits near (50 - 1)/2 = 24.5, FT-1 near 50: FT-2 - FT-1 is about -25.5."""
    out = run(["compare", "tags", "--tag", "FT-1", "--tag", "FT-2", "--window", "2026-03-02T00:10:00Z..",
               str(twin_file)], capsys)  # fmt: skip
    assert "difference (FT-2 - FT-1)" in out
    document = json.loads(
        run(["compare", "tags", "--tag", "FT-1", "--tag", "FT-2", "--json", str(twin_file)], capsys)
    )
    assert document["result"]["welch"]["difference"] == pytest.approx(-25.5, abs=1.0)


def test_config_input_section_sets_columns_and_quality_encoding(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A file with a 'reading' column and OPC UA integer status codes (0 Good, 0x80000000 Bad) is read
    through --config; the bad rows are left out (OPC 10000-4 StatusCode severity bits)."""
    seconds = np.arange(600)
    values = np.where(seconds % 2 == 0, 1.0, 3.0) + np.where(seconds >= 300, 1.0, 0.0)
    status = np.where(seconds % 100 == 0, 0x80000000, 0)
    table = pa.table(
        {
            "timestamp": pa.array(iso(seconds)),
            "tag": pa.array(["LI-7"] * 600),
            "reading": pa.array(values),
            "quality": pa.array(status, pa.int64()),
        }
    )
    data = tmp_path / "codes.csv"
    pacsv.write_csv(table, data)
    config = tmp_path / "site.yaml"
    config.write_text("input:\n  value: reading\n  quality_encoding: opcua\n", encoding="utf-8")
    argv = ["compare", "before-after", "--tag", "LI-7", "--at", "2026-03-02T00:05:00Z", "--method", "naive"]
    document = json.loads(run([*argv, "--config", str(config), "--json", str(data)], capsys))
    assert [side["not_good"] for side in document["inputs"]] == [3, 3]
    assert document["result"]["welch"]["difference"] == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["before-after", "--tag", "TI-100"], "--at"),
        (["before-after", "--tag", "TI-100", "--at", "yesterday"], "--at"),
        (
            ["before-after", "--tag", "TI-100", "--at", CHANGE, "--before", "..2026-03-02T01:00:00Z"],
            "not both",
        ),
        (
            [
                "before-after",
                "--tag",
                "TI-100",
                "--before",
                "2026-03-02T00:00:00Z..2026-03-02T01:30:00Z",
                "--after",
                "2026-03-02T01:00:00Z..",
            ],
            "overlap",
        ),  # fmt: skip
        (["before-after", "--tag", "TI-100", "--at", CHANGE, "--span", "ten minutes"], "--span"),
        (["before-after", "--tag", "TI-100", "--at", CHANGE, "--alpha", "0.9"], "--alpha"),
        (["before-after", "--tag", "TI-100", "--at", CHANGE, "--threshold", "0"], "--threshold"),
        (["tags", "--tag", "TI-100"], "exactly twice"),
        (["paired", "--tag", "TI-100", "--tag", "TI-100"], "the same"),
        (["tags", "--tag", "A", "--tag", "B", "--window", "2026-03-02T01:00:00Z"], "START..END"),
    ],
)
def test_bad_arguments_raise_usage_errors(argv: list[str], message: str, step_file: Path) -> None:
    """Each mistake is a UsageError whose message names the option or the rule broken."""
    parser = argparse.ArgumentParser(prog="streamguard")
    register(parser.add_subparsers(dest="command"))
    args = parser.parse_args(["compare", *argv, str(step_file)])
    with pytest.raises(UsageError, match=message):
        args.handler(args)


def test_unknown_tag_and_empty_window_are_input_errors(step_file: Path) -> None:
    """A tag not in the files, or a window with no good samples, is an InputError naming tag and window."""
    parser = argparse.ArgumentParser(prog="streamguard")
    register(parser.add_subparsers(dest="command"))
    args = parser.parse_args(["compare", "before-after", "--tag", "PI-9", "--at", CHANGE, str(step_file)])
    with pytest.raises(InputError, match="PI-9"):
        args.handler(args)
    args = parser.parse_args(["compare", "before-after", "--tag", "TI-100", "--at", "2026-03-03T00:00:00Z",
                              str(step_file)])  # fmt: skip
    with pytest.raises(InputError, match="after window"):
        args.handler(args)


def test_cli_reports_usage_errors_without_a_traceback(
    step_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Through streamguard.cli.main: exit code 2 and a one-line message on stderr."""
    from streamguard.cli import main

    code = main(["compare", "before-after", "--tag", "TI-100", str(step_file)])
    assert code == 2
    assert "error:" in capsys.readouterr().err
