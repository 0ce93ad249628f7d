"""Settings side by side: one pass over the files gives each setting exactly its own replay, and ``weigh``.

Data (invented, seeded): three tags sampled every second for 3 000 s, independent N(0, 1), tag T2 with a
step of +1.5 sigma from sample 2 000 on. Settings A and B differ only in the CUSUM decision interval.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import yaml

from streamguard.cli import main
from streamguard.config import parse_config
from streamguard.errors import UsageError
from streamguard.replay import run_replay
from streamguard.review.side_by_side import Contender, replay_side_by_side, weigh
from streamguard.timeparse import format_time

START = 1_772_409_600  # 2026-03-02T00:00:00Z in seconds


def settings(h: float) -> dict:
    return {
        "detectors": {"shewhart": {"limit": 3.0}, "cusum": {"k": 0.5, "h": h}, "ewma": {"lambda": 0.2, "L": 2.962}},
        "alarms": {"clear_after": 5},
        "tags": {"*": {"baseline": {"mean": 0.0, "sigma": 1.0}}},
    }


@pytest.fixture(scope="module")
def files(tmp_path_factory: pytest.TempPathFactory) -> dict:
    folder = tmp_path_factory.mktemp("weigh")
    rng = np.random.default_rng(20260302)
    n = 3000
    values = rng.standard_normal((3, n))
    values[2, 2000:] += 1.5
    lines = ["timestamp,tag,value"]
    for i in range(n):
        stamp = format_time((START + i) * 10**9)
        lines += [f"{stamp},T{t},{values[t, i]:.5f}" for t in range(3)]
    data = folder / "data.csv"
    data.write_text("\n".join(lines) + "\n", encoding="utf-8")
    paths = {}
    for name, h in (("A", 4.0), ("B", 6.0)):
        paths[name] = folder / f"{name}.yaml"
        paths[name].write_text(yaml.safe_dump(settings(h)), encoding="utf-8")
    incidents = folder / "incidents.csv"
    incidents.write_text(f"tag,start,end,label\nT2,{format_time((START + 2000) * 10**9)},,step\n", encoding="utf-8")
    return {"data": data, "A": paths["A"], "B": paths["B"], "incidents": incidents, "folder": folder}


def test_one_pass_gives_each_setting_its_own_replay(files: dict) -> None:
    contenders = [Contender(name, parse_config(settings(h)), None) for name, h in (("A", 4.0), ("B", 6.0))]
    together = replay_side_by_side(contenders, [files["data"]], chunk_rows=1000)
    for contender, result in zip(contenders, together, strict=True):
        alone = run_replay(contender.config, None, [files["data"]])
        assert [e.to_dict() for e in result.events] == [e.to_dict() for e in alone.events]
        assert result.summary["totals"] == alone.summary["totals"]
    # A wider decision interval never raises CUSUM more often on the same data.
    raises = [r.summary["totals"]["raises"]["cusum"] for r in together]
    assert raises[0] >= raises[1]


def test_weigh_scores_incidents_for_every_setting(files: dict) -> None:
    contenders = [Contender(name, parse_config(settings(h)), None) for name, h in (("A", 4.0), ("B", 6.0))]
    results = replay_side_by_side(contenders, [files["data"]])
    from streamguard.review.incidents import read_incidents

    standings = weigh(contenders, results, read_incidents(files["incidents"]))
    for standing, result in zip(standings, results, strict=True):
        assert standing.raises == sum(result.summary["totals"]["raises"].values())
        detection = standing.detection(0)
        assert detection is not None  # a 1.5 sigma step held for 1 000 points is caught by every setting
        # False alarms: every raise before the step or on T0/T1 (the incident is open to the end of the data).
        onset = (START + 2000) * 10**9
        expected = sum(1 for e in result.events if e.kind == "raise" and (e.tag != "T2" or e.ts_ns < onset))
        assert standing.false_alarms == expected


def test_weigh_command_writes_tables_json_and_report(files: dict, capsys: pytest.CaptureFixture[str]) -> None:
    out = files["folder"]
    code = main(["weigh", "--config", str(files["A"]), "--config", str(files["B"]), "--incidents",
                 str(files["incidents"]), "--json", str(out / "weigh.json"), "--report", str(out / "weigh.html"),
                 str(files["data"])])  # fmt: skip
    assert code == 0
    printed = capsys.readouterr().out
    assert "incidents detected" in printed and "T2 step" in printed
    summary = json.loads((out / "weigh.json").read_text())
    assert set(summary["settings"]) == {"A", "B"}
    assert summary["overall"]["incidents detected"] == {"A": "1 of 1", "B": "1 of 1"}
    page = (out / "weigh.html").read_text(encoding="utf-8")
    assert page.count("<svg") >= 3 and "http://" not in page.replace('xmlns="http://www.w3.org/2000/svg"', "").replace(
        'xmlns:xlink="http://www.w3.org/1999/xlink"', "")


def test_weigh_needs_two_settings_read_the_same_way(files: dict, tmp_path: Path,
                                                    capsys: pytest.CaptureFixture[str]) -> None:  # fmt: skip
    assert main(["weigh", "--config", str(files["A"]), str(files["data"])]) == 2
    assert "at least two" in capsys.readouterr().err
    assert main(["weigh", "-c", str(files["A"]), "-c", str(files["B"]), "-l", "x.yaml", "-l", "y.yaml", "-l", "z.yaml",
                 str(files["data"])]) == 2  # fmt: skip
    assert "--limits" in capsys.readouterr().err
    other = settings(5.0) | {"input": {"timestamp_format": "iso"}}
    with pytest.raises(UsageError, match="input: section differs"):
        replay_side_by_side([Contender("A", parse_config(settings(4.0)), None),
                             Contender("C", parse_config(other), None, "C.yaml")], [files["data"]])  # fmt: skip
