"""How close the historian reader comes to pyarrow reading the same file on its own.

Generates a long CSV (ISO timestamps with a +02:00 offset, 1000 tags, OPC classic quality) and the
same data as Parquet into benchmarks/data/ (git-ignored), then times, interleaved so machine load
hits both alike, pyarrow alone against ``read_historian`` consuming every chunk. Prints medians.

    .venv/bin/python benchmarks/bench_read.py            # 10M rows, as the replay speed target states
    .venv/bin/python benchmarks/bench_read.py --quick    # 1M rows, well under a minute
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pa_csv
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from streamguard.sources.historian import InputSettings, read_historian  # noqa: E402

DATA = Path(__file__).resolve().parent / "data"
SETTINGS = InputSettings(quality_encoding="opc_classic")
# The column types the reader asks of pyarrow: the fairest (fastest) pyarrow-alone reference.
TYPES = {
    "timestamp": pa.timestamp("ns", tz="UTC"),
    "tag": pa.dictionary(pa.int32(), pa.string()),
    "value": pa.float64(),
    "quality": pa.dictionary(pa.int32(), pa.string()),
}


def generate(rows: int, tags: int, csv_path: Path, parquet_path: Path) -> None:
    """Invented demo data: one sample per tag per second, values normal(50, 5)."""
    steps = rows // tags
    start = np.datetime64("2024-03-01T00:00:00", "ms") + np.timedelta64(250, "ms")
    wall_clock = np.datetime_as_string(start + np.arange(steps) * np.timedelta64(1, "s") + np.timedelta64(2, "h"))
    stamps = pa.array(np.char.add(wall_clock.astype(str), "+02:00"))
    names = pa.array([f"area{t // 100:02d}.TI{t:04d}.PV" for t in range(tags)])
    rng = np.random.default_rng(1)
    table = pa.table(
        {
            "timestamp": pc.take(stamps, pa.array(np.repeat(np.arange(steps), tags))),
            "tag": pc.take(names, pa.array(np.tile(np.arange(tags), steps))),
            "value": pc.cast(pa.array(np.round(rng.normal(50.0, 5.0, steps * tags), 3)), pa.string()),
            "quality": pa.array(np.full(steps * tags, 192, dtype=np.int32)),
        }
    )
    DATA.mkdir(parents=True, exist_ok=True)
    with pa_csv.CSVWriter(csv_path, table.schema, write_options=pa_csv.WriteOptions(quoting_style="none")) as out:
        out.write_table(table)
    typed = pa_csv.read_csv(csv_path, convert_options=pa_csv.ConvertOptions(column_types=TYPES))
    typed = typed.set_column(3, "quality", typed.column("quality").cast(pa.string()).cast(pa.int32()))
    pq.write_table(typed, parquet_path)


def pyarrow_csv(path: Path) -> int:
    options = pa_csv.ConvertOptions(column_types=TYPES, timestamp_parsers=[pa_csv.ISO8601])
    return int(pa_csv.read_csv(path, convert_options=options).num_rows)


def pyarrow_parquet(path: Path) -> int:
    return int(pq.read_table(path).num_rows)


def reader(path: Path) -> int:
    return sum(len(chunk) for chunk in read_historian([path], SETTINGS))


def race(runs: int, contestants: dict[str, Callable[[], int]]) -> dict[str, tuple[list[float], int]]:
    """Seconds of each run of each contestant, run in turns so that load from elsewhere hits both."""
    times: dict[str, list[float]] = {name: [] for name in contestants}
    counts: dict[str, int] = {}
    for _ in range(runs):
        for name, run in contestants.items():
            began = time.perf_counter()
            counts[name] = run()
            times[name].append(time.perf_counter() - began)
    return {name: (times[name], counts[name]) for name in contestants}


def report(title: str, results: dict[str, tuple[list[float], int]], reference: str, candidate: str) -> None:
    """Medians, and the best run beside them: on a shared machine the best is the least disturbed."""
    print(title)
    for name, (seconds, rows) in results.items():
        median, best = statistics.median(seconds), min(seconds)
        print(
            f"  {name:<27} median {median:6.3f} s {rows / median / 1e6:6.2f} M rows/s"
            f"   best {best:6.3f} s {rows / best / 1e6:6.2f} M rows/s"
        )
    reference_times, candidate_times = results[reference][0], results[candidate][0]
    median_ratio = statistics.median(reference_times) / statistics.median(candidate_times)
    best_ratio = min(reference_times) / min(candidate_times)
    print(f"  read_historian / pyarrow alone: median {median_ratio:.0%}, best {best_ratio:.0%}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--tags", type=int, default=1000)
    parser.add_argument("--runs", type=int, default=5)
    parser.add_argument("--quick", action="store_true", help="1M rows, 3 runs")
    options = parser.parse_args()
    rows, runs = (1_000_000, 3) if options.quick else (options.rows, options.runs)
    csv_path = DATA / f"long_{rows}x{options.tags}.csv"
    parquet_path = csv_path.with_suffix(".parquet")
    if not (csv_path.exists() and parquet_path.exists()):
        generate(rows, options.tags, csv_path, parquet_path)
    print(
        f"{rows:,} rows x {options.tags} tags, {csv_path.stat().st_size / 1e6:.0f} MB CSV, {runs} runs, "
        f"{pa.cpu_count()} pyarrow threads"
    )
    csv_results = race(
        runs, {"pyarrow.csv.read_csv": lambda: pyarrow_csv(csv_path), "read_historian (CSV)": lambda: reader(csv_path)}
    )
    report("CSV", csv_results, "pyarrow.csv.read_csv", "read_historian (CSV)")
    parquet_results = race(
        runs,
        {
            "pyarrow.parquet.read_table": lambda: pyarrow_parquet(parquet_path),
            "read_historian (Parquet)": lambda: reader(parquet_path),
        },
    )
    report("Parquet", parquet_results, "pyarrow.parquet.read_table", "read_historian (Parquet)")


if __name__ == "__main__":
    main()
