"""Replay end to end on the demo scenario, the command line's contract, and bad input."""

from __future__ import annotations

import csv
import gzip
import json
from pathlib import Path

import pytest

from streamguard.cli import main
from streamguard.config import load_config
from streamguard.limits import load_limits
from streamguard.replay import run_replay
from streamguard.timeparse import parse_time

ROOT = Path(__file__).resolve().parents[1]
DAYS = [ROOT / "replay_data" / f"quillmere-day{d}.csv.gz" for d in (1, 2, 3, 4)]
CONFIG = ROOT / "config" / "demo.yaml"


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> dict:
    out = tmp_path_factory.mktemp("demo")
    assert main(["baseline", "-c", str(CONFIG), "-o", str(out / "limits.yaml"), str(DAYS[0])]) == 0
    assert main(["replay", "-c", str(CONFIG), "-l", str(out / "limits.yaml"), "-o", str(out), *map(str, DAYS)]) == 0
    events = [json.loads(line) for line in (out / "events.jsonl").read_text().splitlines()]
    summary = json.loads((out / "summary.json").read_text())
    incidents = list(csv.DictReader((ROOT / "replay_data" / "incidents.csv").open()))
    return {"out": out, "events": events, "summary": summary, "incidents": incidents}


def _incident(demo: dict, label: str) -> dict:
    return next(i for i in demo["incidents"] if i["label"] == label)


def _raises(demo: dict, tag: str) -> list[dict]:
    return [e for e in demo["events"] if e["tag"] == tag and e["kind"] == "raise"]


def test_events_are_in_timestamp_order_with_unique_ids(demo: dict) -> None:
    """events.jsonl is in timestamp order and every id is unique."""
    times = [parse_time(e["ts"]) for e in demo["events"]]
    assert times == sorted(times)
    assert len({e["id"] for e in demo["events"]}) == len(demo["events"])


def test_step_shift_is_caught_within_minutes(demo: dict) -> None:
    """The injected 1.5 sigma step is raised by CUSUM or EWMA within 10 minutes of onset (ten one-minute
    subgroups; the design ARL of these settings at that shift is a few subgroups)."""
    incident = _incident(demo, "step_shift")
    onset = parse_time(incident["start"])
    first = min(parse_time(e["ts"]) for e in _raises(demo, incident["tag"]) if parse_time(e["ts"]) >= onset)
    assert first - onset <= 10 * 60 * 10**9


def test_slow_drift_is_caught(demo: dict) -> None:
    """The 0.5 sigma/hour drift is raised before it ends (4 hours)."""
    incident = _incident(demo, "slow_drift")
    onset, end = parse_time(incident["start"]), parse_time(incident["end"])
    assert any(onset <= parse_time(e["ts"]) < end for e in _raises(demo, incident["tag"]))


def test_sensor_faults_raise_quality_events_not_process_alarms(demo: dict) -> None:
    """Stuck transmitter, bad-quality burst, out-of-range spikes: quality events and exclusions only."""
    for label, kind in (("stuck_transmitter", "stale"), ("out_of_range", "range")):
        incident = _incident(demo, label)
        assert any(e["tag"] == incident["tag"] and e["kind"] == kind for e in demo["events"])
        assert _raises(demo, incident["tag"]) == []
    burst = _incident(demo, "bad_quality_burst")
    assert demo["summary"]["tags"][burst["tag"]]["excluded"]["bad_quality"] == 120
    assert _raises(demo, burst["tag"]) == []
    late = _incident(demo, "out_of_order")
    assert demo["summary"]["tags"][late["tag"]]["excluded"]["out_of_order"] == 4


def test_false_alarms_stay_near_design(demo: dict) -> None:
    """Outside the incident tags, the settings were designed for about 4 false raises over the run (see
    config/demo.yaml); a Poisson(4) count exceeds 12 with probability < 0.001, so more means a defect."""
    incident_tags = {i["tag"] for i in demo["incidents"]}
    others = [e for e in demo["events"] if e["kind"] == "raise" and e["tag"] not in incident_tags]
    assert len(others) <= 12


def test_autocorrelated_tag_alarms_far_more_than_designed(demo: dict) -> None:
    """The AR(1) tank level alarms hundreds of times with individuals limits: the known failure mode."""
    tag = _incident(demo, "autocorrelated")["tag"]
    assert len(_raises(demo, tag)) > 100


def test_summary_counts_add_up(demo: dict) -> None:
    """Per tag, samples read = used + excluded, and the totals are the sums."""
    tags = demo["summary"]["tags"]
    for row in tags.values():
        assert row["samples_read"] == row["samples_used"] + sum(row["excluded"].values())
    assert demo["summary"]["totals"]["samples_read"] == sum(r["samples_read"] for r in tags.values())


def test_splitting_across_files_gives_identical_events(tmp_path: Path, demo: dict) -> None:
    """The same rows split into two files, named in either order, give the same events."""
    lines = gzip.open(DAYS[1], "rt").read().splitlines()
    header, rows = lines[0], lines[1:]
    half = len(rows) // 2
    (tmp_path / "b.csv").write_text("\n".join([header, *rows[half:]]) + "\n")
    (tmp_path / "a.csv").write_text("\n".join([header, *rows[:half]]) + "\n")
    config = load_config(CONFIG)
    limits = load_limits(demo["out"] / "limits.yaml")
    whole = run_replay(config, limits, [DAYS[1]])
    split = run_replay(config, limits, [tmp_path / "b.csv", tmp_path / "a.csv"], chunk_rows=10_007)
    assert [e.to_dict() for e in split.events] == [e.to_dict() for e in whole.events]
    assert whole.events


def test_bad_config_exits_2_with_key_path(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A wrong value exits 2 and names the key path; no traceback."""
    bad = tmp_path / "bad.yaml"
    bad.write_text("detectors:\n  cusum: {h: -1}\n")
    assert main(["check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "detectors.cusum.h: must be > 0" in err and "Traceback" not in err


def test_missing_file_exits_2_with_path(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """An unreadable input file exits 2 naming the path."""
    missing = tmp_path / "nope.csv"
    assert main(["replay", "-c", str(CONFIG), "-o", str(tmp_path / "o"), str(missing)]) == 2
    assert str(missing) in capsys.readouterr().err


def test_bad_rows_counted_or_strict(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A row with an unparsable number is skipped and counted with file:line; --strict stops there (exit 2)."""
    data = tmp_path / "x.csv"
    rows = ["timestamp,tag,value"] + [f"2026-01-01T00:00:{s:02d}Z,X-1,{s}.5" for s in range(10)]
    rows[4] = "2026-01-01T00:00:03Z,X-1,abc"
    data.write_text("\n".join(rows) + "\n")
    config = tmp_path / "c.yaml"
    config.write_text("tags:\n  '*': {baseline: {mean: 0, sigma: 1}}\n")
    assert main(["replay", "-c", str(config), "-o", str(tmp_path / "o"), str(data)]) == 0
    summary = json.loads((tmp_path / "o" / "summary.json").read_text())
    skipped = summary["totals"]["rows_skipped_by_reader"]
    assert sum(skipped["counts"].values()) == 1
    assert any(f"{data}:5" in example for examples in skipped["examples"].values() for example in examples)
    capsys.readouterr()
    assert main(["replay", "--strict", "-c", str(config), "-o", str(tmp_path / "o2"), str(data)]) == 2
    assert f"{data}:5" in capsys.readouterr().err


def test_tag_without_limits_is_reported_by_name(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A tag with no baseline anywhere is named in the output and summary, and skipped."""
    data = tmp_path / "x.csv"
    data.write_text("timestamp,tag,value\n2026-01-01T00:00:00Z,ORPHAN-9,1.0\n2026-01-01T00:00:01Z,ORPHAN-9,2.0\n")
    config = tmp_path / "c.yaml"
    config.write_text("detectors: {cusum: {}}\n")
    assert main(["replay", "-c", str(config), "-o", str(tmp_path / "o"), str(data)]) == 0
    assert "ORPHAN-9" in capsys.readouterr().out
    summary = json.loads((tmp_path / "o" / "summary.json").read_text())
    assert summary["tags_without_limits"] == ["ORPHAN-9"]
