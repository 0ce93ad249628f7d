"""Replay end to end against pyarrow reading the same file alone (issue targets: >= 50 % of pyarrow's CSV
read rate, >= 30 % of its Parquet read rate, on 10 M rows x 1000 tags with ISO timestamps with offsets).

Uses the data of bench_read.py (generated into benchmarks/data/, git-ignored). The replay runs the default
detector set (Shewhart we1-we4, CUSUM, EWMA) with limits given in the config and writes nothing: the
figure is read + gate + subgroups + detectors + events. Runs are interleaved with pyarrow's so that load
from elsewhere hits both alike; medians and the best run are printed.

    .venv/bin/python benchmarks/bench_replay.py            # 10 M rows
    .venv/bin/python benchmarks/bench_replay.py --quick    # 1 M rows
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

from bench_read import DATA, generate, pyarrow_csv, pyarrow_parquet, race, report  # noqa: E402

from streamguard.config import parse_config  # noqa: E402
from streamguard.replay import run_replay  # noqa: E402

TAGS = {"*": {"baseline": {"mean": 50.0, "sigma": 5.0}, "stale_after": 30, "max_gap": "5m"}}
CONFIGS = {
    # The default detector set on white noise: rules we1-we4 signal about every 90 points, so this replay
    # makes ~300,000 events per 10 M rows -- an alarm flood no site would run, and the cost of its events.
    "default": parse_config({
        "input": {"quality_encoding": "opc_classic"},
        "detectors": {"shewhart": {"rules": ["we1", "we2", "we3", "we4"]}, "cusum": {"h": 5.0}, "ewma": {}},
        "tags": TAGS,
    }),
    # Settings sized for a false-alarm budget (rule 1 at 4.5, CUSUM h 10, EWMA L 3.6): the same detectors and
    # the same work per sample, with the few events a tuned plant sees.
    "tuned": parse_config({
        "input": {"quality_encoding": "opc_classic"},
        "detectors": {"shewhart": {"limit": 4.5, "rules": ["we1"]}, "cusum": {"h": 10.0},
                      "ewma": {"lambda": 0.1, "L": 3.6}},
        "tags": TAGS,
    }),
}  # fmt: skip
CONFIG = CONFIGS["default"]


def replay(path: Path) -> int:
    result = run_replay(CONFIG, None, [path])
    return int(result.summary["totals"]["samples_read"])


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--tags", type=int, default=1000)
    parser.add_argument("--runs", type=int, default=5)
    parser.add_argument("--quick", action="store_true", help="1M rows, 3 runs")
    parser.add_argument("--config", choices=sorted(CONFIGS), default="default")
    args = parser.parse_args()
    global CONFIG
    CONFIG = CONFIGS[args.config]
    print(f"config: {args.config}")
    rows, runs = (1_000_000, 3) if args.quick else (args.rows, args.runs)
    csv_path = DATA / f"long_{rows}x{args.tags}.csv"
    parquet_path = DATA / f"long_{rows}x{args.tags}.parquet"
    if not csv_path.exists() or not parquet_path.exists():
        generate(rows, args.tags, csv_path, parquet_path)
    replay(csv_path)  # warm: compile caches, page cache
    results = race(runs, {"pyarrow read_csv alone": lambda: pyarrow_csv(csv_path),
                          "streamguard replay (CSV)": lambda: replay(csv_path)})  # fmt: skip
    report(f"CSV, {rows:,} rows x {args.tags} tags (target >= 50 %)", results,
           "pyarrow read_csv alone", "streamguard replay (CSV)")  # fmt: skip
    results = race(runs, {"pyarrow read_table alone": lambda: pyarrow_parquet(parquet_path),
                          "streamguard replay (Parquet)": lambda: replay(parquet_path)})  # fmt: skip
    report(f"Parquet, {rows:,} rows x {args.tags} tags (target >= 30 %)", results,
           "pyarrow read_table alone", "streamguard replay (Parquet)")  # fmt: skip


if __name__ == "__main__":
    main()
