"""The ``weigh`` command: replay two or more settings on the same history and compare them.

An edge module: it parses arguments, loads configs and limits, and hands them to ``side_by_side``;
tables go to stdout, and on request a JSON file and a self-contained HTML report. Everything heavy is
imported inside the handler, so registering the command costs the command line nothing.
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

_DESCRIPTION = """\
Replay two or more settings on the same historian files, in one pass over the files, and set them
side by side: raises, alarm load, and with --incidents, false alarms, incidents detected and how late.

  streamguard weigh --config h5.yaml --config h6.yaml --limits limits.yaml --incidents incidents.csv \\
      --report weigh.html day1.csv.gz day2.csv.gz

--limits once applies to every config; give it once per --config to pair them in order. All configs
must read the files the same way (identical input: sections).
"""


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "weigh", help="replay several settings on the same data in one pass and compare them side by side",
        description=_DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter,
    )  # fmt: skip
    parser.add_argument("--config", "-c", action="append", required=True, metavar="C.yaml",
                        help="a setting to weigh; give it two or more times")  # fmt: skip
    parser.add_argument("--limits", "-l", action="append", default=[], metavar="L.yaml",
                        help="limits file: once for all configs, or once per config in the same order")  # fmt: skip
    parser.add_argument("--label", action="append", default=[],
                        help="a name per config for the tables (default: its file name)")  # fmt: skip
    parser.add_argument("--incidents", metavar="CSV", help="known incidents (tag,start,end,label) to score detection")
    parser.add_argument("--report", metavar="HTML", help="write a self-contained HTML comparison")
    parser.add_argument("--json", metavar="OUT", help="write the comparison as JSON")
    parser.add_argument("--strict", action="store_true", help="stop at the first bad row with file:line")
    parser.add_argument("files", nargs="+", metavar="FILE")
    parser.set_defaults(handler=run_weigh)
    return parser


def _labels(configs: list[str], given: list[str]) -> list[str]:
    from ..errors import UsageError

    if given and len(given) != len(configs):
        raise UsageError(f"--label: give one per --config ({len(configs)}), or none; got {len(given)}")
    if given:
        labels = given
    else:
        labels = [Path(c).stem for c in configs]
        if len(set(labels)) < len(labels):
            labels = [str(c) for c in configs]
    if len(set(labels)) < len(labels):
        raise UsageError("--label: the labels must differ: " + ", ".join(labels))
    return labels


def run_weigh(args: argparse.Namespace) -> int:
    import json
    import sys

    from ..config import load_config
    from ..errors import UsageError
    from ..limits import load_limits
    from .incidents import read_incidents
    from .replay_review import data_period
    from .side_by_side import Contender, format_weighing, replay_side_by_side, weigh, weighing_to_dict
    from .tag_traces import collect_samples

    configs: list[str] = args.config
    if len(configs) < 2:
        raise UsageError("--config: give at least two settings to weigh (--config A.yaml --config B.yaml)")
    if len(args.limits) not in (0, 1, len(configs)):
        raise UsageError(f"--limits: give it once (for every config) or once per --config ({len(configs)}); "
                         f"got {len(args.limits)}")  # fmt: skip
    labels = _labels(configs, args.label)
    if args.report:
        from .figures import require_matplotlib

        require_matplotlib()
    loaded_limits = [load_limits(path) for path in args.limits]
    contenders = []
    for k, (path, label) in enumerate(zip(configs, labels, strict=True)):
        limits = loaded_limits[k] if len(loaded_limits) > 1 else (loaded_limits[0] if loaded_limits else None)
        contenders.append(Contender(label, load_config(path), limits, path))
    incidents = read_incidents(args.incidents) if args.incidents else None
    show_progress = sys.stderr.isatty()
    results = replay_side_by_side(contenders, args.files, strict=args.strict, show_progress=show_progress)
    sample_times = None
    if incidents:
        samples = collect_samples(args.files, contenders[0].config, {i.tag for i in incidents},
                                  show_progress=show_progress)  # fmt: skip
        sample_times = {name: s.ts[s.ts.argsort(kind="stable")] for name, s in samples.items()}
    standings = weigh(contenders, results, incidents, sample_times=sample_times)
    for line in format_weighing(standings):
        print(line)
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        Path(args.json).write_text(json.dumps(weighing_to_dict(contenders, standings), indent=2) + "\n",
                                   encoding="utf-8")  # fmt: skip
        print(f"wrote {args.json}")
    if args.report:
        from .weigh_report import build_weigh_report

        start, end = data_period(results[0])
        text = build_weigh_report(contenders, standings, start, end)
        Path(args.report).parent.mkdir(parents=True, exist_ok=True)
        Path(args.report).write_text(text, encoding="utf-8")
        print(f"wrote {args.report} ({len(text.encode()) / 1e6:.2f} MB)")
    return 0
