"""Checks of the demo scenario: the committed historian files, their incidents list and config/demo.yaml.

The data is invented (scripts/make_demo.py); these tests pin that the committed files are exactly what the
script makes, that every injected incident is really in the data where incidents.csv says, and that the
clean parts behave as the scenario claims, so the demo's alarms can be read against a known truth.
Statistical checks compare with the generator's stated parameters, with tolerances of four standard
errors from large-sample theory (named beside each check); with about a hundred such checks on one fixed
seed, a four-sigma tolerance leaves well under a 1 % chance that a correct generator fails one.
"""

from __future__ import annotations

import csv
import gzip
import importlib.util
import subprocess
import sys
from dataclasses import dataclass
from datetime import datetime
from functools import cached_property
from pathlib import Path
from types import ModuleType

import numpy as np
import pyarrow as pa
import pyarrow.csv as pa_csv
import pytest
import yaml

from streamguard.durations import parse_duration

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "replay_data"
SCRIPT = ROOT / "scripts" / "make_demo.py"
CONFIG = ROOT / "config" / "demo.yaml"
NS = 1_000_000_000
KINDS = {
    "step_shift",
    "slow_drift",
    "stuck_transmitter",
    "bad_quality_burst",
    "gap",
    "out_of_range",
    "out_of_order",
    "noisy_in_control",
    "autocorrelated",
}
TOLERANCE_SE = 4.0


def load_script() -> ModuleType:
    spec = importlib.util.spec_from_file_location("make_demo", SCRIPT)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules["make_demo"] = module  # dataclasses look their module up while the file executes
    spec.loader.exec_module(module)
    return module


demo = load_script()


@dataclass
class Rows:
    """All four day files concatenated in file (arrival) order."""

    tag: np.ndarray  # object: str
    ts: np.ndarray  # int64 ns UTC
    value: np.ndarray  # float64, NaN where the file says NaN
    quality: np.ndarray  # object: str
    day: np.ndarray  # int: which file the row came from
    tag_code: np.ndarray  # int32 index into tag_names
    tag_names: list[str]

    @cached_property
    def positions(self) -> dict[str, np.ndarray]:
        """Row indices of each tag, in file order: one grouping pass instead of a scan per question."""
        order = np.argsort(self.tag_code, kind="stable")
        bounds = np.searchsorted(self.tag_code[order], np.arange(len(self.tag_names) + 1))
        return {name: order[bounds[i] : bounds[i + 1]] for i, name in enumerate(self.tag_names)}

    def of(self, tag: str) -> Rows:
        keep = self.positions[tag]
        return Rows(
            self.tag[keep],
            self.ts[keep],
            self.value[keep],
            self.quality[keep],
            self.day[keep],
            self.tag_code[keep],
            self.tag_names,
        )


@dataclass(frozen=True)
class IncidentRow:
    tag: str
    start: int
    end: int | None
    label: str


def parse_utc(text: str) -> int:
    assert text.endswith("Z"), f"incident times are UTC with Z: {text!r}"
    return int(datetime.fromisoformat(text).timestamp()) * NS


def read_incidents() -> list[IncidentRow]:
    with (DATA / "incidents.csv").open(newline="") as handle:
        reader = csv.DictReader(handle)
        assert reader.fieldnames == ["tag", "start", "end", "label"]
        return [
            IncidentRow(
                row["tag"],
                parse_utc(row["start"]),
                parse_utc(row["end"]) if row["end"] else None,
                row["label"],
            )
            for row in reader
        ]


def incident(label: str) -> IncidentRow:
    (found,) = [row for row in read_incidents() if row.label == label]
    return found


@pytest.fixture(scope="module")
def rows() -> Rows:
    options = pa_csv.ConvertOptions(
        column_types={
            "timestamp": pa.timestamp("ns", tz="UTC"),
            "tag": pa.dictionary(pa.int32(), pa.string()),
            "value": pa.float64(),
        }
    )
    parts = []
    for day in range(1, demo.DAYS + 1):
        table = pa_csv.read_csv(DATA / demo.day_file_name(day), convert_options=options)
        assert table.column_names == ["timestamp", "tag", "value", "quality"]
        parts.append((table, day))
    tags = pa.chunked_array([chunk for t, _ in parts for chunk in t["tag"].chunks]).unify_dictionaries()
    codes = pa.concat_arrays(tags.chunks)
    return Rows(
        np.concatenate([t["tag"].cast(pa.string()).to_numpy(zero_copy_only=False) for t, _ in parts]),
        np.concatenate([t["timestamp"].cast(pa.int64()).to_numpy() for t, _ in parts]),
        np.concatenate([t["value"].fill_null(np.nan).to_numpy() for t, _ in parts]),
        np.concatenate([t["quality"].to_numpy(zero_copy_only=False) for t, _ in parts]),
        np.concatenate([np.full(t.num_rows, day) for t, day in parts]),
        codes.indices.to_numpy(),
        [str(name) for name in codes.dictionary.to_pylist()],
    )


@pytest.fixture(scope="module")
def config() -> dict:
    with CONFIG.open() as handle:
        loaded = yaml.safe_load(handle)
    assert isinstance(loaded, dict)
    return loaded


def in_window(ts: np.ndarray, start: int, end: int | None) -> np.ndarray:
    return (ts >= start) & (ts < (demo.DATA_END if end is None else end))


def lag1_autocorrelation(x: np.ndarray) -> float:
    centred = x - x.mean()
    return float(np.dot(centred[1:], centred[:-1]) / np.dot(centred, centred))


def longest_run_of_equal_values(x: np.ndarray) -> int:
    if x.shape[0] == 0:
        return 0
    changes = np.flatnonzero(np.diff(x) != 0)
    edges = np.concatenate([[-1], changes, [x.shape[0] - 1]])
    return int(np.diff(edges).max())


def test_regeneration_reproduces_the_committed_files(tmp_path: Path) -> None:
    """Running the script again gives the committed text byte for byte (gzip level aside)."""
    subprocess.run(
        [sys.executable, str(SCRIPT), "--out", str(tmp_path), "--compress-level", "1"],
        check=True,
        capture_output=True,
        timeout=120,
    )
    made = sorted(p.name for p in tmp_path.iterdir())
    committed = {p.name for p in DATA.iterdir()}
    assert set(made) <= committed
    assert {name for name in committed if name.startswith(demo.SITE)} == {
        name for name in made if name.startswith(demo.SITE)
    }
    for name in made:
        if name.endswith(".gz"):
            regenerated = gzip.decompress((tmp_path / name).read_bytes())
            assert regenerated == gzip.decompress((DATA / name).read_bytes()), name
        else:
            assert (tmp_path / name).read_bytes() == (DATA / name).read_bytes()


def test_committed_files_stay_small() -> None:
    """The demo data is committed to the repository, so all of it stays under 4 MB."""
    assert sum(p.stat().st_size for p in DATA.iterdir()) < 4_000_000


def test_gzip_headers_carry_no_time_or_name() -> None:
    """mtime 0 and no file name: recompressing never shows up as a change in version control."""
    for day in range(1, demo.DAYS + 1):
        header = (DATA / demo.day_file_name(day)).read_bytes()[:10]
        assert header[:3] == b"\x1f\x8b\x08"  # RFC 1952: magic, deflate
        assert header[3] == 0  # FLG: no FNAME, no FCOMMENT
        assert header[4:8] == b"\x00\x00\x00\x00"  # MTIME


def test_incidents_file_lists_each_injected_kind_once() -> None:
    incidents = read_incidents()
    labels = [row.label for row in incidents]
    assert sorted(labels) == sorted(KINDS)
    for row in incidents:
        assert row.tag in demo.TAG_BY_NAME
        assert demo.at(1, 0) <= row.start < demo.DATA_END
        if row.end is not None:
            assert row.start < row.end <= demo.DATA_END
    # The injected upsets (all but the two whole-run tag properties) sit in the monitored days 2-4.
    for row in incidents:
        if row.label not in {"noisy_in_control", "autocorrelated"}:
            assert row.start >= demo.at(2, 0), row


def test_day_files_hold_one_utc_day_each_with_every_tag(rows: Rows) -> None:
    """Rows per tag follow from the sample period; only the gap removes any."""
    gap = incident("gap")
    for day in range(1, demo.DAYS + 1):
        today = rows.day == day
        assert rows.ts[today].min() == demo.at(day, 0)
        assert rows.ts[today].max() < demo.at(day + 1, 0)
        assert set(rows.tag[today]) == set(demo.TAG_BY_NAME)
        for spec in demo.TAGS:
            expected = 86_400 // spec.period_s
            if spec.name == gap.tag and demo.at(day, 0) <= gap.start < demo.at(day + 1, 0):
                assert gap.end is not None
                expected -= (gap.end - gap.start) // (spec.period_s * NS)
            assert np.count_nonzero(rows.of(spec.name).day == day) == expected, (day, spec.name)
    assert 20 <= len(demo.TAGS) <= 25


def test_one_day_writes_a_utc_offset_the_others_write_z() -> None:
    for day in range(1, demo.DAYS + 1):
        with gzip.open(DATA / demo.day_file_name(day), "rt") as handle:
            handle.readline()
            first = handle.readline().split(",")[0]
        if day == demo.OFFSET_DAY:
            assert first.endswith("+01:00") and first.startswith(f"2026-03-0{day + 1}T01:00:00")
        else:
            assert first == f"2026-03-0{day + 1}T00:00:00Z"


def test_quality_words_and_where_they_occur(rows: Rows) -> None:
    """Bad rows only in the burst; uncertain rows only in the turbidimeter's wiper cycles."""
    assert set(rows.quality) == {"good", "uncertain", "bad"}
    burst = incident("bad_quality_burst")
    bad = rows.quality == "bad"
    assert set(rows.tag[bad]) == {burst.tag}
    assert np.all(in_window(rows.ts[bad], burst.start, burst.end))
    uncertain = rows.quality == "uncertain"
    assert set(rows.tag[uncertain]) == {demo.WIPER_TAG}
    # four wiper cycles a day, three samples each
    assert np.count_nonzero(uncertain) == demo.DAYS * 4 * demo.WIPER_SAMPLES


def test_baseline_day_matches_each_tags_design(rows: Rows) -> None:
    """Day 1 recovers each tag's setpoint, sigma and (lack of) autocorrelation."""
    for spec in demo.TAGS:
        tag = rows.of(spec.name)
        x = tag.value[(tag.day == 1) & (tag.quality == "good")]
        n = x.shape[0]
        phi = spec.phi
        # Standard error of the mean of an AR(1) series: sigma * sqrt((1 + phi) / ((1 - phi) n))
        # (Box, Jenkins & Reinsel, Time Series Analysis, large-sample variance of the mean); phi = 0 gives
        # the familiar sigma / sqrt(n).
        se_mean = spec.sigma * np.sqrt((1 + phi) / ((1 - phi) * n))
        assert abs(x.mean() - spec.mean) < TOLERANCE_SE * se_mean, spec.name
        # Relative standard error of the sample standard deviation: sqrt(1 / (2n)) for independent
        # normal data, times sqrt((1 + phi^2) / (1 - phi^2)) for AR(1) (Bartlett 1946).
        se_relative_sd = np.sqrt((1 + phi**2) / ((1 - phi**2) * 2 * n))
        assert abs(x.std(ddof=1) / spec.sigma - 1) < TOLERANCE_SE * se_relative_sd, spec.name
        # Lag-1 autocorrelation: standard error sqrt((1 - phi^2) / n) (Bartlett 1946; Box, Jenkins &
        # Reinsel), i.e. 1 / sqrt(n) for white noise.
        se_r1 = np.sqrt((1 - phi**2) / n)
        assert abs(lag1_autocorrelation(x) - phi) < TOLERANCE_SE * se_r1, spec.name


def test_autocorrelated_tag_is_strongly_autocorrelated(rows: Rows) -> None:
    """The lesson tag: its lag-1 autocorrelation is 0.8-0.9 on every day, far from the white-noise band."""
    found = incident("autocorrelated")
    tag = rows.of(found.tag)
    for day in range(1, demo.DAYS + 1):
        r1 = lag1_autocorrelation(tag.value[tag.day == day])
        assert 0.8 <= r1 <= 0.9, (day, r1)


def test_noisy_tag_is_wide_but_in_control(rows: Rows) -> None:
    """Same sigma in the baseline and in days 2-4, and the widest relative spread on the site."""
    found = incident("noisy_in_control")
    spec = demo.TAG_BY_NAME[found.tag]
    tag = rows.of(found.tag)
    baseline, later = tag.value[tag.day == 1], tag.value[tag.day > 1]
    # Ratio of two independent sample SDs: relative SE sqrt(1/(2 n1) + 1/(2 n2)) (normal theory).
    se_ratio = np.sqrt(1 / (2 * baseline.shape[0]) + 1 / (2 * later.shape[0]))
    assert abs(later.std(ddof=1) / baseline.std(ddof=1) - 1) < TOLERANCE_SE * se_ratio
    se_mean = spec.sigma * np.sqrt(1 / baseline.shape[0] + 1 / later.shape[0])
    assert abs(later.mean() - baseline.mean()) < TOLERANCE_SE * se_mean
    relative_spread = {s.name: s.sigma / s.mean for s in demo.TAGS}
    assert max(relative_spread, key=relative_spread.__getitem__) == found.tag


def test_step_shift_moves_the_mean_by_the_stated_amount(rows: Rows) -> None:
    found = incident("step_shift")
    spec = demo.TAG_BY_NAME[found.tag]
    tag = rows.of(found.tag)
    inside = tag.value[in_window(tag.ts, found.start, found.end)]
    baseline = tag.value[tag.day == 1]
    se = spec.sigma * np.sqrt(1 / inside.shape[0] + 1 / baseline.shape[0])
    shift = (inside.mean() - baseline.mean()) / spec.sigma
    assert abs(shift - demo.STEP_SIGMAS) < TOLERANCE_SE * se / spec.sigma
    # and the tag returns: the hours after the window look like the baseline again
    assert found.end is not None
    after = tag.value[in_window(tag.ts, found.end, found.end + 4 * 3600 * NS)]
    se_after = spec.sigma * np.sqrt(1 / after.shape[0] + 1 / baseline.shape[0])
    assert abs(after.mean() - baseline.mean()) < TOLERANCE_SE * se_after


def test_slow_drift_has_the_stated_slope(rows: Rows) -> None:
    found = incident("slow_drift")
    spec = demo.TAG_BY_NAME[found.tag]
    tag = rows.of(found.tag)
    inside = in_window(tag.ts, found.start, found.end)
    hours = (tag.ts[inside] - found.start) / (3600 * NS)
    slope, _ = np.polyfit(hours, tag.value[inside], 1)
    # Least-squares slope standard error sigma / sqrt(Sxx) (any regression text).
    se_slope = spec.sigma / np.sqrt(np.sum((hours - hours.mean()) ** 2))
    expected = demo.DRIFT_SIGMAS_PER_HOUR * spec.sigma
    assert abs(slope - expected) < TOLERANCE_SE * se_slope


def test_stuck_transmitter_repeats_its_last_value_with_good_quality(rows: Rows) -> None:
    found = incident("stuck_transmitter")
    assert found.end is not None
    tag = rows.of(found.tag)
    inside = np.flatnonzero(in_window(tag.ts, found.start, found.end))
    assert inside.shape[0] == (found.end - found.start) // (demo.TAG_BY_NAME[found.tag].period_s * NS)
    assert np.all(tag.value[inside] == tag.value[inside[0] - 1])
    assert np.all(tag.quality[inside] == "good")
    assert tag.value[inside[-1] + 1] != tag.value[inside[-1]]


def test_bad_quality_burst_carries_garbage_values(rows: Rows) -> None:
    found = incident("bad_quality_burst")
    assert found.end is not None
    tag = rows.of(found.tag)
    inside = in_window(tag.ts, found.start, found.end)
    assert np.all(tag.quality[inside] == "bad")
    values = tag.value[inside]
    assert np.all(np.isnan(values) | (values == demo.BAD_SENTINEL))
    assert np.isnan(values).any() and (values == demo.BAD_SENTINEL).any()
    assert np.count_nonzero(inside) == (found.end - found.start) // (10 * NS)


def test_gap_is_the_only_interval_longer_than_max_gap(rows: Rows, config: dict) -> None:
    """Each tag's samples are never further apart than max_gap, except across the one injected gap."""
    max_gap = parse_duration(config["tags"]["*"]["max_gap"])
    found = incident("gap")
    for spec in demo.TAGS:
        ts = np.sort(rows.of(spec.name).ts)
        intervals = np.diff(ts)
        long_ones = np.flatnonzero(intervals > max_gap)
        if spec.name == found.tag:
            (where,) = long_ones
            assert ts[where] == found.start - spec.period_s * NS and ts[where + 1] == found.end
        else:
            assert long_ones.shape[0] == 0, spec.name


def test_out_of_order_rows_arrive_late_by_the_stated_window(rows: Rows) -> None:
    """In file order the tag's time goes backwards exactly once, onto the delayed rows."""
    found = incident("out_of_order")
    tag = rows.of(found.tag)
    backwards = np.flatnonzero(np.diff(tag.ts) < 0) + 1
    assert backwards.shape[0] == 1
    first_late = backwards[0]
    assert tag.ts[first_late] == found.start
    late = in_window(tag.ts, found.start, found.end)
    late_positions = np.flatnonzero(late)
    # the delayed rows sit together, after rows stamped later than all of them
    assert np.all(np.diff(late_positions) == 1) and late_positions[0] == first_late
    assert tag.ts[first_late - 1] > found.end
    others = [rows.of(spec.name).ts for spec in demo.TAGS if spec.name != found.tag]
    assert all(np.all(np.diff(ts) > 0) for ts in others)


def test_out_of_range_values_only_in_the_spike_window(rows: Rows, config: dict) -> None:
    """Against the ranges in config/demo.yaml, good-quality values leave the range only in the spikes."""
    found = incident("out_of_range")
    for name, spec in demo.TAG_BY_NAME.items():
        low, high = config["tags"][name]["range"]
        assert (low, high) == (spec.range_low, spec.range_high), name
        tag = rows.of(name)
        outside = (tag.quality == "good") & ((tag.value < low) | (tag.value > high))
        if name == found.tag:
            assert np.count_nonzero(outside) == len(demo.SPIKES)
            assert np.all(in_window(tag.ts[outside], found.start, found.end))
            assert tag.ts[outside].min() == found.start
        else:
            assert not outside.any(), name


def test_healthy_tags_never_repeat_a_value_as_long_as_stale_after(rows: Rows, config: dict) -> None:
    """Rounding is fine enough that only the stuck transmitter trips the stale check."""
    stale_after = config["tags"]["*"]["stale_after"]
    found = incident("stuck_transmitter")
    for spec in demo.TAGS:
        tag = rows.of(spec.name)
        values = tag.value[tag.quality != "bad"]
        run = longest_run_of_equal_values(values)
        if spec.name == found.tag:
            assert run > stale_after
        else:
            assert run < stale_after // 3, (spec.name, run)


def test_demo_config_covers_every_tag_with_units(config: dict) -> None:
    """Every tag in the data has its own entry with units; every exact entry names a real tag."""
    tags = config["tags"]
    exact = {name for name in tags if not any(c in name for c in "*?[")}
    assert exact == set(demo.TAG_BY_NAME)
    for name in exact:
        assert tags[name]["units"] == demo.TAG_BY_NAME[name].units
    baseline = tags["*"]["baseline"]
    assert parse_utc(baseline["start"]) == demo.at(1, 0)
    assert parse_utc(baseline["end"]) == demo.at(2, 0)
