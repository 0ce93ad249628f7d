"""The replay review end to end on the demo scenario: summary sections, incident delays, the HTML report.

The demo's injected incidents (replay_data/incidents.csv, written by scripts/make_demo.py from the same
numbers that made the data) are the ground truth the delays are checked against; the alarm-load
figures are checked against a plain recount of events.jsonl. The report is parsed with html.parser and,
where Chromium is installed, rendered headless to a PNG that must not be blank.
"""

from __future__ import annotations

import csv
import gzip
import json
import shutil
import subprocess
import time
from collections import Counter
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from streamguard.cli import main
from streamguard.timeparse import parse_time

ROOT = Path(__file__).resolve().parents[1]
DAYS = [ROOT / "replay_data" / f"quillmere-day{d}.csv.gz" for d in (1, 2, 3, 4)]
CONFIG = ROOT / "config" / "demo.yaml"
INCIDENTS = ROOT / "replay_data" / "incidents.csv"
PROCESS = ("shewhart", "cusum", "ewma", "spread")
TEN_MINUTES = 600 * 10**9


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> dict:
    out = tmp_path_factory.mktemp("review")
    limits = out / "limits.yaml"
    assert main(["baseline", "-c", str(CONFIG), "-o", str(limits), str(DAYS[0])]) == 0
    started = time.monotonic()
    code = main(["replay", "-c", str(CONFIG), "-l", str(limits), "-o", str(out), "--report", str(out / "review.html"),
                 "--incidents", str(INCIDENTS), *map(str, DAYS)])  # fmt: skip
    print(f"replay and review of the demo: {time.monotonic() - started:.1f} s")
    assert code == 0
    events = [json.loads(line) for line in (out / "events.jsonl").read_text().splitlines()]
    return {
        "out": out,
        "limits": limits,
        "events": events,
        "summary": json.loads((out / "summary.json").read_text()),
        "html": (out / "review.html").read_text(encoding="utf-8"),
        "incidents": list(csv.DictReader(INCIDENTS.open())),
    }


def _raises(demo: dict) -> list[dict]:
    return [e for e in demo["events"] if e["kind"] == "raise" and e["detector"] in PROCESS]


def test_alarm_load_matches_a_plain_recount(demo: dict) -> None:
    """Rates, peak and flood share recounted from events.jsonl with clock-aligned 10-minute windows."""
    load = demo["summary"]["alarm_load"]
    figures = load["figures"]
    raises = _raises(demo)
    start, end = parse_time(load["period"]["start"]), parse_time(load["period"]["end"])
    assert figures["alarms"] == len(raises) == sum(demo["summary"]["totals"]["raises"].values())
    hours = (end - start) / 3.6e12
    assert figures["alarms_per_hour"] == pytest.approx(len(raises) / hours)
    windows = Counter((parse_time(e["ts"]) - start // TEN_MINUTES * TEN_MINUTES) // TEN_MINUTES for e in raises)
    n_windows = (end - 1 - start // TEN_MINUTES * TEN_MINUTES) // TEN_MINUTES + 1
    assert figures["peak_10_minutes"] == max(windows.values())
    assert figures["flood_share_percent"] == pytest.approx(100 * sum(c > 10 for c in windows.values()) / n_windows)
    by_tag = Counter(e["tag"] for e in raises)
    assert figures["top_share_percent"] == pytest.approx(100 * sum(c for _, c in by_tag.most_common(10)) / len(raises))


def test_chattering_matches_a_brute_force_search(demo: dict) -> None:
    """Three raises of one tag and detector inside less than a minute (common practice), by brute force."""
    times: dict[tuple[str, str], list[int]] = {}
    for e in _raises(demo):
        times.setdefault((e["tag"], e["detector"]), []).append(parse_time(e["ts"]))
    expected = sorted(key for key, ts in times.items()
                      if any(ts[i + 2] - ts[i] < 60 * 10**9 for i in range(len(ts) - 2)))  # fmt: skip
    found = sorted((c["tag"], c["detector"]) for c in demo["summary"]["alarm_load"]["chattering"])
    assert found == expected


def _incident(demo: dict, label: str) -> dict:
    return next(i for i in demo["summary"]["incidents"]["incidents"] if i["label"] == label)


def _first_raise(demo: dict, tag: str, detector: str, start: int, end: int) -> int | None:
    kinds = ("raise",) if detector != "quality" else ("gap", "stale", "range")
    times = [parse_time(e["ts"]) for e in demo["events"] if e["tag"] == tag and e["detector"] == detector
             and e["kind"] in kinds and start <= parse_time(e["ts"]) <= end]  # fmt: skip
    return min(times) if times else None


def test_incident_delays_against_the_injected_onsets(demo: dict) -> None:
    """Every reported delay is first raise minus the onset written in incidents.csv, per detector."""
    end_of_data = parse_time(demo["summary"]["alarm_load"]["period"]["end"])
    for row in demo["incidents"]:
        scored = next(i for i in demo["summary"]["incidents"]["incidents"] if i["label"] == row["label"])
        onset = parse_time(row["start"])
        end = parse_time(row["end"]) if row["end"] else end_of_data
        for detector, score in scored["detectors"].items():
            first = _first_raise(demo, row["tag"], detector, onset, end)
            assert score["detected"] == (first is not None), (row["label"], detector)
            if first is not None:
                assert score["delay_s"] == pytest.approx((first - onset) / 1e9), (row["label"], detector)


def test_step_and_drift_delays_are_within_their_design(demo: dict) -> None:
    """Step: 1.5 sigma on a 10 s tag is 1.5 * sqrt(6) = 3.67 standard errors of the one-minute mean; with
    Shewhart at 4.4 a point signals with p = P(Z > 0.73) = 0.23, so 20 points without one has probability
    0.77^20 = 0.5 %: the Shewhart delay is within 20 minutes. The drift (0.5 sigma/h over 4 h) is caught
    before it ends by CUSUM and EWMA (the demo config's stated purpose of lambda = 0.1)."""
    step = _incident(demo, "step_shift")["detectors"]
    assert step["shewhart"]["detected"] and step["shewhart"]["delay_s"] <= 20 * 60
    drift = _incident(demo, "slow_drift")["detectors"]
    assert drift["cusum"]["detected"] and drift["ewma"]["detected"]
    assert max(drift["cusum"]["delay_s"], drift["ewma"]["delay_s"]) < 4 * 3600


def _samples(tag: str, start: int, end: int) -> int:
    count = 0
    for day in DAYS:
        with gzip.open(day, "rt", encoding="utf-8") as handle:
            for row in csv.DictReader(handle):
                if row["tag"] == tag and start <= parse_time(row["timestamp"]) <= end:
                    count += 1
    return count


def test_delay_in_samples_counts_the_tag_rows_from_onset_to_raise(demo: dict) -> None:
    """Delay in samples for the step (CUSUM) recounted from the raw files; the stuck transmitter is caught by
    the stale check after stale_after = 30 identical values, the first being the last healthy reading
    before the onset (the stuck value is held), so 29 samples after the onset (config/demo.yaml)."""
    step = _incident(demo, "step_shift")
    cusum = step["detectors"]["cusum"]
    onset = parse_time(step["start"])
    assert cusum["delay_samples"] == _samples("FT-202", onset, parse_time(cusum["first_raise"]))
    stuck = _incident(demo, "stuck_transmitter")["detectors"]["quality"]
    assert stuck["detected"] and stuck["delay_samples"] == 29


def test_summary_gains_the_review_sections(demo: dict) -> None:
    summary = demo["summary"]
    assert {"alarm_load", "incidents", "design_check"} <= set(summary)
    flagged = {row["tag"] for row in summary["design_check"] if row["flag"] == "more than designed"}
    assert "LT-305" in flagged  # autocorrelated, charted as individuals (config/demo.yaml says so)
    assert summary["incidents"]["by_detector"]["shewhart"]["incidents"] == len(demo["incidents"])


class _Collector(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: Counter[str] = Counter()
        self.ids: set[str] = set()
        self.references: list[str] = []
        self.style = ""
        self._in_style = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags[tag] += 1
        for name, value in attrs:
            if name == "id" and value:
                self.ids.add(value)
            if name in ("src", "href", "xlink:href", "action", "data", "poster") and value:
                self.references.append(value)
        self._in_style = tag == "style"

    def handle_endtag(self, tag: str) -> None:
        self._in_style = False

    def handle_data(self, data: str) -> None:
        if self._in_style:
            self.style += data


def test_report_has_every_section_and_its_figures(demo: dict) -> None:
    page = _Collector()
    page.feed(demo["html"])
    assert {"overview", "alarm-load", "design", "tags", "incidents", "reading"} <= page.ids
    assert page.tags["svg"] >= 6  # rate, top tags, design, at least one episode, delays, a missed incident
    assert page.tags["path"] > 100
    assert len(demo["html"].encode()) < 3_000_000


def test_report_references_nothing_outside_itself(demo: dict) -> None:
    page = _Collector()
    page.feed(demo["html"])
    assert page.tags["script"] == 0 and page.tags["link"] == 0 and page.tags["iframe"] == 0
    assert page.tags["img"] == 0
    assert all(ref.startswith("#") for ref in page.references), [r for r in page.references if not r.startswith("#")]
    style = page.style.lower()
    assert "@import" not in style and "url(" not in style and "@font-face" not in style


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        found = shutil.which(name)
        if found:
            return found
    return "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None


def test_report_renders_in_headless_chromium(demo: dict, tmp_path: Path) -> None:
    """Rendered offline to a PNG, the page is not blank: many grey levels and a good share of ink."""
    browser = _chromium()
    if browser is None:
        print("skipped: no Chromium on this machine (Debian package 'chromium')")
        pytest.skip("Chromium is not installed (Debian package 'chromium')")
    shot = tmp_path / "review.png"
    command = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
               "--disable-background-networking", "--disable-component-update", "--disable-sync",
               f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=1200,2000",
               (demo["out"] / "review.html").as_uri()]  # fmt: skip
    subprocess.run(command, check=True, timeout=120, capture_output=True)
    from matplotlib.image import imread

    pixels = imread(str(shot))[..., :3]
    grey = pixels.mean(axis=2)
    assert grey.shape == (2000, 1200)
    # A blank page is one colour (variance 0); text, tables and figures give a spread of grey levels.
    assert grey.std() > 0.05
    background = np.median(grey)
    assert np.mean(np.abs(grey - background) > 0.1) > 0.02
