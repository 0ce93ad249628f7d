"""The ``compare`` command: offline answers to "did the change work?" and "do these two still agree?".

An edge module: it parses arguments, reads historian files through ``series``, and hands plain
arrays to ``analysis``; all statistics live there. Every mistake the user can make becomes a
UsageError (arguments) or InputError (data) whose message names the option or tag and window.
"""

from __future__ import annotations

import argparse
import math
import sys
from typing import Any

import numpy as np

from ..durations import format_duration, parse_duration
from ..errors import InputError, UsageError
from ..timeparse import parse_time
from .analysis import METHODS, Method, compare_paired, compare_samples
from .pairing import pair_nearest
from .report import format_paired, format_two_sample, to_json
from .series import TagSeries, Window, excluded_in_window, in_window, median_interval_s, read_tag_series

_DESCRIPTION = """\
Compare means of historian data offline, with serial correlation taken into account.

  before-after  one tag, before and after a change (at a time, or two windows): Welch's test
  tags          two tags over the same window: Welch's test
  paired        two instruments measuring the same thing, matched in time: paired t test

Only samples of GOOD quality with finite values are used. By default the test runs on means of
blocks long enough to be nearly independent (--method blocks); --method effective_n shrinks n to
n(1-r1)/(1+r1) instead; --method naive counts every sample as independent. Times are ISO 8601
with Z or an offset (a time without one is taken as UTC); windows are START..END, either side
may be left open, START included, END excluded.
"""


def _common_options() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("files", nargs="+", metavar="FILE", help="historian files (CSV or Parquet)")
    common.add_argument("--alpha", type=float, default=0.05, help="significance level (default 0.05)")
    common.add_argument(
        "--power", type=float, default=0.8, help="wanted power for the data-sufficiency answer (default 0.8)"
    )
    common.add_argument(
        "--confidence", type=float, default=None, help="confidence level of the interval (default 1 - alpha)"
    )
    common.add_argument(
        "--threshold", type=float, default=None, metavar="X",
        help="practical difference in engineering units: power to detect it, data needed, equivalence test",
    )  # fmt: skip
    common.add_argument(
        "--method",
        choices=METHODS,
        default="blocks",
        help="how serial correlation is handled (default blocks)",
    )
    common.add_argument("--json", action="store_true", help="write the result as JSON instead of a table")
    common.add_argument(
        "--config", metavar="C.yaml", default=None, help="config file; only its input: section is used"
    )
    return common


def register(subparsers: Any) -> argparse.ArgumentParser:
    """Add ``compare`` and its three forms to the top-level subparsers."""
    common = _common_options()
    parser = subparsers.add_parser(
        "compare",
        help="compare means offline: before/after a change, two tags, or two instruments paired in time",
        description=_DESCRIPTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    forms = parser.add_subparsers(dest="comparison", metavar="FORM")

    before_after = forms.add_parser(
        "before-after", parents=[common], help="one tag before and after a change",
        description="Welch's test of after - before for one tag. Give --at TIME (optionally --span and"
        " --settle), or --before START..END and --after START..END.",
    )  # fmt: skip
    before_after.add_argument("--tag", required=True, help="the tag to compare")
    before_after.add_argument(
        "--at", metavar="TIME", help="time of the change: before is earlier, after is later"
    )
    before_after.add_argument("--span", metavar="DURATION", help="with --at: length of each side (e.g. 7d)")
    before_after.add_argument(
        "--settle", metavar="DURATION", help="with --at: leave out this long after the change (transient)"
    )
    before_after.add_argument("--before", metavar="START..END", help="the before window")
    before_after.add_argument("--after", metavar="START..END", help="the after window")

    tags = forms.add_parser(
        "tags", parents=[common], help="two tags over the same window",
        description="Welch's test of B - A for two tags over the same window (samples not matched in time).",
    )  # fmt: skip
    tags.add_argument("--tag", action="append", required=True, metavar="TAG", help="give twice: A then B")
    tags.add_argument("--window", metavar="START..END", help="time window (default: all data)")

    paired = forms.add_parser(
        "paired", parents=[common], help="two instruments matched in time",
        description="Paired t test of (scale * B + offset) - A, each sample of A matched to the nearest"
        " sample of B within --tolerance (each B sample used once).",
    )  # fmt: skip
    paired.add_argument("--tag", action="append", required=True, metavar="TAG", help="give twice: A then B")
    paired.add_argument("--window", metavar="START..END", help="time window (default: all data)")
    paired.add_argument(
        "--tolerance", default="5s", metavar="DURATION", help="largest time gap of a pair (default 5s)"
    )
    paired.add_argument(
        "--scale", type=float, default=1.0, help="B is multiplied by this before comparing (default 1)"
    )
    paired.add_argument("--offset", type=float, default=0.0, help="and then this is added (default 0)")

    for form in (parser, before_after, tags, paired):
        form.set_defaults(handler=run_compare)
    return parser


def _time(text: str, option: str) -> int:
    try:
        return parse_time(text)
    except ValueError as exc:
        raise UsageError(f"{option}: {exc}") from None


def _duration(text: str, option: str) -> int:
    try:
        return parse_duration(text)
    except ValueError as exc:
        raise UsageError(f"{option}: {exc}") from None


def parse_window(text: str | None, option: str) -> Window:
    """START..END with either side optional; END must come after START."""
    if text is None:
        return Window()
    if ".." not in text:
        raise UsageError(
            f"{option}: {text!r} is not a window; write START..END"
            " (e.g. 2026-03-01T00:00Z..2026-03-02T00:00Z)"
        )
    start_text, end_text = (part.strip() for part in text.split("..", 1))
    start = _time(start_text, option) if start_text else None
    end = _time(end_text, option) if end_text else None
    if start is not None and end is not None and end <= start:
        raise UsageError(f"{option}: the end of {text!r} is not after its start")
    return Window(start, end)


def _check_levels(args: argparse.Namespace) -> None:
    if not 0.0 < args.alpha < 0.5:
        raise UsageError(f"--alpha: {args.alpha} is not between 0 and 0.5")
    if not 0.0 < args.power < 1.0:
        raise UsageError(f"--power: {args.power} is not between 0 and 1")
    if args.confidence is not None and not 0.0 < args.confidence < 1.0:
        raise UsageError(f"--confidence: {args.confidence} is not between 0 and 1")
    if args.threshold is not None and not (math.isfinite(args.threshold) and args.threshold != 0):
        raise UsageError("--threshold: give a practical difference other than zero, in engineering units")


def _two_tags(args: argparse.Namespace) -> tuple[str, str]:
    if len(args.tag) != 2:
        raise UsageError(
            f"compare {args.comparison}: give --tag exactly twice (A then B), got {len(args.tag)}"
        )
    first, second = args.tag
    if first == second:
        raise UsageError(f"compare {args.comparison}: the two --tag values are the same ({first!r})")
    return first, second


def _input_settings(path: str | None) -> Any:
    if path is None:
        return None
    from ..config import load_config
    from ..sources.historian import InputSettings

    return InputSettings(**load_config(path).input.model_dump())


def _selected(series: TagSeries, window: Window, label: str) -> tuple[np.ndarray, np.ndarray, dict[str, Any]]:
    ts, value = in_window(series, window)
    not_good, not_finite = excluded_in_window(series, window)
    record = {
        "label": label,
        "tag": series.tag,
        "window": window.to_dict(),
        "rows": int(ts.shape[0]) + not_good + not_finite,
        "not_good": not_good,
        "not_finite": not_finite,
        "used": int(ts.shape[0]),
    }
    if ts.shape[0] < 3:
        raise InputError(
            f"tag {series.tag!r}, {label} window {window.describe()}: {ts.shape[0]} good samples;"
            " a comparison needs at least 3 (widen the window or check the tag's quality)"
        )
    return ts, value, record


def _input_line(record: dict[str, Any], window: Window) -> str:
    return (
        f"  {record['label']}: tag {record['tag']}, {window.describe()}: {record['used']} samples used"
        f" of {record['rows']} rows ({record['not_good']} not good, {record['not_finite']} not finite)"
    )


def _typical_interval(*ts_arrays: np.ndarray) -> float | None:
    intervals = [value for value in (median_interval_s(ts) for ts in ts_arrays) if value is not None]
    return float(np.median(intervals)) if intervals else None


def _before_after_windows(args: argparse.Namespace) -> tuple[Window, Window]:
    if args.at is not None:
        if args.before is not None or args.after is not None:
            raise UsageError("compare before-after: give either --at or --before/--after, not both")
        at = _time(args.at, "--at")
        span = _duration(args.span, "--span") if args.span is not None else None
        settle = _duration(args.settle, "--settle") if args.settle is not None else 0
        start_after = at + settle
        before = Window(at - span if span is not None else None, at)
        after = Window(start_after, start_after + span if span is not None else None)
        return before, after
    if args.span is not None or args.settle is not None:
        raise UsageError("compare before-after: --span and --settle go with --at")
    if args.before is None or args.after is None:
        raise UsageError(
            "compare before-after: give --at TIME, or both --before START..END and --after START..END"
        )
    before, after = parse_window(args.before, "--before"), parse_window(args.after, "--after")
    before_end = before.end if before.end is not None else np.iinfo(np.int64).max
    after_end = after.end if after.end is not None else np.iinfo(np.int64).max
    before_start = before.start if before.start is not None else np.iinfo(np.int64).min
    after_start = after.start if after.start is not None else np.iinfo(np.int64).min
    if before_start < after_end and after_start < before_end:
        raise UsageError(
            f"--before {args.before} and --after {args.after} overlap; a sample must not count twice"
        )
    return before, after


def _settings_record(args: argparse.Namespace) -> dict[str, Any]:
    return {
        "method": args.method,
        "alpha": args.alpha,
        "power": args.power,
        "confidence": args.confidence if args.confidence is not None else 1.0 - args.alpha,
        "threshold": args.threshold,
    }


def _problems_record(problems: Any) -> Any:
    return problems.to_dict() if hasattr(problems, "to_dict") else None


def _analyse(context: str, function: Any, *values: np.ndarray, **options: Any) -> Any:
    try:
        return function(*values, **options)
    except ValueError as exc:
        raise InputError(f"{context}: {exc}") from None


def _run_two_sample(args: argparse.Namespace) -> tuple[dict[str, Any], str]:
    settings = _input_settings(args.config)
    if args.comparison == "before-after":
        windows = _before_after_windows(args)
        series, problems = read_tag_series(args.files, [args.tag], settings)
        sides = [(series[args.tag], windows[0], "before"), (series[args.tag], windows[1], "after")]
        title = f"compare before-after: tag {args.tag}"
    else:
        first_tag, second_tag = _two_tags(args)
        window = parse_window(args.window, "--window")
        series, problems = read_tag_series(args.files, [first_tag, second_tag], settings)
        sides = [(series[first_tag], window, first_tag), (series[second_tag], window, second_tag)]
        title = f"compare tags: {first_tag} and {second_tag}"
    (ts_a, value_a, record_a), (ts_b, value_b, record_b) = (_selected(*side) for side in sides)
    result = _analyse(
        title, compare_samples, value_a, value_b,
        labels=(record_a["label"], record_b["label"]), method=args.method, alpha=args.alpha, power=args.power,
        confidence=args.confidence, threshold=args.threshold, sample_interval_s=_typical_interval(ts_a, ts_b),
    )  # fmt: skip
    document = {
        "comparison": args.comparison,
        "files": [str(path) for path in args.files],
        "settings": _settings_record(args),
        "inputs": [record_a, record_b],
        "reader_problems": _problems_record(problems),
        "result": result.to_dict(),
    }
    header = [title, _input_line(record_a, sides[0][1]), _input_line(record_b, sides[1][1]), ""]
    return document, format_two_sample(result, header)


def _run_paired(args: argparse.Namespace) -> tuple[dict[str, Any], str]:
    first_tag, second_tag = _two_tags(args)
    window = parse_window(args.window, "--window")
    tolerance = _duration(args.tolerance, "--tolerance")
    if not (math.isfinite(args.scale) and math.isfinite(args.offset)) or args.scale == 0:
        raise UsageError("--scale must be a finite number other than zero and --offset a finite number")
    series, problems = read_tag_series(args.files, [first_tag, second_tag], _input_settings(args.config))
    ts_a, value_a, record_a = _selected(series[first_tag], window, first_tag)
    ts_b, value_b, record_b = _selected(series[second_tag], window, second_tag)
    pairing = pair_nearest(ts_a, ts_b, tolerance)
    title = f"compare paired: {first_tag} and {second_tag}"
    if pairing.pairs < 3:
        raise InputError(
            f"{title}, window {window.describe()}: only {pairing.pairs} pairs within {args.tolerance}"
            f" ({pairing.unmatched_first} of {first_tag} and {pairing.unmatched_second} of {second_tag}"
            " unmatched); widen --tolerance or the window"
        )
    transformed = args.scale != 1.0 or args.offset != 0.0
    second_label = f"{second_tag} (x{args.scale:g} {args.offset:+g})" if transformed else second_tag
    first_values = value_a[pairing.first_index]
    second_values = args.scale * value_b[pairing.second_index] + args.offset
    result = _analyse(
        title, compare_paired, first_values, second_values,
        labels=(first_tag, second_label), method=args.method, alpha=args.alpha, power=args.power,
        confidence=args.confidence, threshold=args.threshold,
        sample_interval_s=median_interval_s(ts_a[pairing.first_index]),
    )  # fmt: skip
    document = {
        "comparison": "paired",
        "files": [str(path) for path in args.files],
        "settings": _settings_record(args),
        "inputs": [record_a, record_b],
        "transform": {"scale": args.scale, "offset": args.offset, "applied_to": second_tag},
        "pairing": pairing.to_dict(),
        "reader_problems": _problems_record(problems),
        "result": result.to_dict(),
    }
    offset_text = "n/a" if pairing.median_offset_s is None else f"{pairing.median_offset_s:.3g} s"
    header = [
        title,
        _input_line(record_a, window),
        _input_line(record_b, window),
        f"  pairs: {pairing.pairs} within {format_duration(tolerance)} (median time offset {offset_text});"
        f" unmatched: {pairing.unmatched_first} of {first_tag}, {pairing.unmatched_second} of {second_tag}",
        "",
    ]
    return document, format_paired(result, header)


def run_compare(args: argparse.Namespace) -> int:
    """Handler for ``streamguard compare FORM ...``; writes a table or JSON to stdout."""
    form = getattr(args, "comparison", None)
    if form is None:
        raise UsageError(
            "compare: name a form: before-after, tags or paired (see streamguard compare --help)"
        )
    _check_levels(args)
    method: Method = args.method
    if method not in METHODS:
        raise UsageError(f"--method: choose one of {', '.join(METHODS)}")
    document, table = _run_paired(args) if form == "paired" else _run_two_sample(args)
    sys.stdout.write(to_json(document) if args.json else table)
    return 0
