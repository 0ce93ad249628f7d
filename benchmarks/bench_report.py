"""How long the replay review takes for a month of 500 tags at one-minute data, and how big the report is.

Generates invented data into benchmarks/data/ (git-ignored): 500 tags, one sample a minute for 30 days
(21.6 M rows, Parquet), in control around 50 +- 2 except 25 tags with a 1.5 sigma step for 6 hours,
10 with a drift of 0.5 sigma an hour for 8 hours (the 35 incidents, written to an incidents CSV), 10
strongly autocorrelated tags (AR(1), phi 0.8: the alarm flood an engineer has to find) and 5 tags noisier
than their baseline. Then times, ``--repeat`` times, the replay alone and the review with the HTML report
and incident scoring, and prints medians, the report's size and the alarm-load figures.

    .venv/bin/python benchmarks/bench_report.py             # the month of 500 tags
    .venv/bin/python benchmarks/bench_report.py --tags 50   # a quick look
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from streamguard.config import parse_config  # noqa: E402
from streamguard.replay import run_replay  # noqa: E402
from streamguard.review import review_replay  # noqa: E402
from streamguard.timeparse import format_time, parse_time  # noqa: E402

DATA = Path(__file__).resolve().parent / "data"
START = parse_time("2026-01-01T00:00:00Z")
MINUTE = 60 * 10**9
CONFIG = {
    "input": {"shape": "long"},
    # Sized like the demo for individuals at one minute: about two months between false alarms per detector.
    "detectors": {"shewhart": {"limit": 4.4, "rules": ["we1"]}, "cusum": {"k": 0.5, "h": 10.0},
                  "ewma": {"lambda": 0.1, "L": 4.3}, "spread": {"limit": 6.5}},
    "alarms": {"clear_after": 15},
    "tags": {"*": {"baseline": {"mean": 50.0, "sigma": 2.0}, "units": "degC", "max_gap": "5m"}},
}  # fmt: skip


def generate(tags: int, days: int, path: Path, incidents_path: Path) -> None:
    """Invented data, seeded: see the module docstring for what is in it."""
    minutes = days * 1440
    rng = np.random.default_rng(20260101)
    values = 50.0 + 2.0 * rng.standard_normal((tags, minutes))
    order = rng.permutation(tags)
    steps, drifts, correlated, noisy = order[:25], order[25:35], order[35:45], order[45:50]
    lines = ["tag,start,end,label"]

    def incident(t: int, onset: int, length: int, label: str) -> str:
        start, end = format_time(START + onset * MINUTE), format_time(START + (onset + length) * MINUTE)
        return f"T{t:04d},{start},{end},{label}"

    for t in steps:
        onset = int(rng.integers(0, minutes - 360))
        values[t, onset:onset + 360] += 1.5 * 2.0
        lines.append(incident(t, onset, 360, "step"))
    for t in drifts:
        onset = int(rng.integers(0, minutes - 480))
        values[t, onset:onset + 480] += 0.5 * 2.0 * np.arange(480) / 60.0
        lines.append(incident(t, onset, 480, "drift"))
    for t in correlated:
        shocks = rng.standard_normal(minutes) * 2.0 * np.sqrt(1 - 0.8**2)
        series = np.empty(minutes)
        series[0] = 0.0
        for i in range(1, minutes):
            series[i] = 0.8 * series[i - 1] + shocks[i]
        values[t] = 50.0 + series
    for t in noisy:
        values[t] = 50.0 + 1.3 * (values[t] - 50.0)
    stamps = (START + np.arange(minutes, dtype=np.int64) * MINUTE)
    names = pa.array([f"T{t:04d}" for t in range(tags)])
    table = pa.table({
        "timestamp": pa.array(np.repeat(stamps, tags), pa.timestamp("ns", tz="UTC")),
        "tag": pa.DictionaryArray.from_arrays(pa.array(np.tile(np.arange(tags, dtype=np.int32), minutes)), names),
        "value": pa.array(np.round(values.T.reshape(-1), 3)),
    })  # fmt: skip
    DATA.mkdir(parents=True, exist_ok=True)
    pq.write_table(table, path, row_group_size=1 << 20)
    incidents_path.write_text("\n".join(lines) + "\n", encoding="utf-8")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--tags", type=int, default=500)
    parser.add_argument("--days", type=int, default=30)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    path = DATA / f"review_{args.tags}x{args.days}d.parquet"
    incidents = DATA / f"review_{args.tags}x{args.days}d_incidents.csv"
    if not path.exists() or not incidents.exists():
        started = time.monotonic()
        generate(args.tags, args.days, path, incidents)
        print(f"generated {path.name} in {time.monotonic() - started:.1f} s")
    config = parse_config(CONFIG)
    rows = pq.ParquetFile(path).metadata.num_rows
    replay_times, review_times = [], []
    lines: list[str] = []
    size = 0
    for _ in range(args.repeat):
        started = time.monotonic()
        result = run_replay(config, None, [path])
        replay_times.append(time.monotonic() - started)
        report = DATA / "review_report.html"
        started = time.monotonic()
        lines = review_replay(result, config, report_path=report, incidents_path=incidents, show_progress=False)
        review_times.append(time.monotonic() - started)
        size = report.stat().st_size
    print(f"{args.tags} tags x {args.days} days at one minute: {rows:,} rows, {len(result.events):,} events")
    print(f"replay:                        median {statistics.median(replay_times):6.1f} s  "
          f"({rows / statistics.median(replay_times) / 1e6:.2f} M rows/s)")  # fmt: skip
    print(f"review (report and incidents): median {statistics.median(review_times):6.1f} s  "
          f"(runs: {', '.join(f'{t:.1f}' for t in review_times)})")  # fmt: skip
    print(f"report: {size / 1e6:.2f} MB")
    for line in lines:
        print("  " + line)
    return 0


if __name__ == "__main__":
    sys.exit(main())
