"""Run-length engine timings: a two-sided CUSUM ARL to 0.1 % (target: well under 100 ms), other ARLs,
and a full ``tune`` for one tag (CUSUM h, EWMA lambda and L, Shewhart limit from a budget).

Medians of several runs after one warm-up call (imports, caches). On a shared two-core machine the
numbers move with the load; compare medians, not single runs.

    python benchmarks/bench_design.py [--runs 7]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from collections.abc import Callable
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from streamguard.design import arl, run_length, tune  # noqa: E402


def median_seconds(action: Callable[[], object], runs: int) -> float:
    action()
    timings = []
    for _ in range(runs):
        started = time.perf_counter()
        action()
        timings.append(time.perf_counter() - started)
    return statistics.median(timings)


CASES: list[tuple[str, Callable[[], object]]] = [
    ("CUSUM two-sided ARL, k=0.5 h=5, shift 1 (0.1 %)", lambda: arl("cusum", {"k": 0.5, "h": 5.0}, 1.0)),
    ("CUSUM two-sided ARL, k=0.25 h=25.6, in control", lambda: arl("cusum", {"k": 0.25, "h": 25.6}, 0.0)),
    ("CUSUM headstart 0.9 (2-D chain), k=0.5 h=4", lambda: arl("cusum", {"k": 0.5, "h": 4.0, "headstart": 0.9})),
    ("EWMA ARL, lambda=0.1 L=2.814 asymptotic", lambda: arl("ewma", {"lambda": 0.1, "L": 2.814,
                                                                     "limits": "asymptotic"}, 1.0)),  # fmt: skip
    ("EWMA ARL, lambda=0.1 L=2.814 exact limits", lambda: arl("ewma", {"lambda": 0.1, "L": 2.814}, 1.0)),
    ("Shewhart we1-we4 ARL (555-state chain)", lambda: arl("shewhart", {"rules": ["we1", "we2", "we3", "we4"]})),
    ("CUSUM run_length (ARL, SDRL, quantiles, steady state)", lambda: run_length("cusum", {"k": 0.5, "h": 5.0})),
    ("tune 1/30d at 1 s, subgroups of 5, shift 0.5", lambda: tune("1/30d", "1s", 0.5, subgroup_size=5)),
    ("tune 1/30d at 10 s, 60 s windows, shift 1.5", lambda: tune("1/30d", "10s", 1.5, subgroup_window="60s")),
    ("tune 1/30d at 1 s, shift 0.5 (lambda at 0.02)", lambda: tune("1/30d", "1s", 0.5)),
]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=7)
    args = parser.parse_args()
    width = max(len(name) for name, _ in CASES)
    for name, action in CASES:
        seconds = median_seconds(action, args.runs)
        print(f"{name.ljust(width)}  {seconds * 1000:9.1f} ms")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
