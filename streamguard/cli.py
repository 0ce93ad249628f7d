"""Command line: the only place that turns errors into exit codes and messages.

Exit codes: 0 done; 1 done, but something the user asked to be strict about failed; 2 user error
(config, input, arguments), with a message naming the place; never a traceback for a user error.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence
from typing import TYPE_CHECKING

from . import __version__
from .errors import StreamguardError

if TYPE_CHECKING:
    from .config import Config
    from .limits import LimitsFile
    from .replay import ReplayResult

# Feature modules that add their own subcommands with register(subparsers), by the commands they add.
# Only the module of the command being run is imported: `streamguard run` should not carry scipy's
# memory for `tune` (about 58 MiB measured).
_FEATURES = {
    "streamguard.design.commands": ("arl", "tune"),
    "streamguard.comparison.commands": ("compare",),
    "streamguard.service_commands": ("run", "publish"),
    "streamguard.review.commands": ("weigh",),
}


def _load_limits(path: str | None) -> LimitsFile | None:
    from .limits import load_limits

    return load_limits(path) if path else None


def cmd_check(args: argparse.Namespace) -> int:
    from .config import load_config, resolve_tag

    config = load_config(args.config)
    limits = _load_limits(args.limits)
    print(f"{args.config}: valid")
    enabled = config.detectors.enabled().items()
    print("detectors: " + ", ".join(f"{n} {p.model_dump(by_alias=True)}" for n, p in enabled))
    print(f"subgroup: {config.subgroup.model_dump(exclude_none=True)}; alarms: clear_after {config.alarms.clear_after}")
    if limits is not None:
        print(f"{args.limits}: valid, limits version {limits.limits_version}, {len(limits.tags)} tags")
        missing = []
        for pattern in config.tags:
            if not any(ch in pattern for ch in "*?[") and pattern not in limits.tags:
                settings = resolve_tag(config, pattern)
                if settings.baseline is None or not hasattr(settings.baseline, "mean"):
                    missing.append(pattern)
        if missing:
            print("tags named in the config with no limits (they will be skipped): " + ", ".join(missing))
        _print_design(config, limits)
    return 0


def _print_design(config: Config, limits: LimitsFile) -> None:
    """Per tag: the designed in-control alarm interval in time, given its sample rate."""
    from .expected_rates import designed_intervals

    rows = designed_intervals(config, limits)
    if rows:
        print()
        print(f"{'tag':<16} {'point every':>11} {'detector':<9} {'in-control ARL':>15}  designed false-alarm interval")
        for row in rows:
            print(f"{row['tag']:<16} {row['period']:>11} {row['detector']:<9} {row['arl']:>15.4g}  {row['interval']}")


def cmd_baseline(args: argparse.Namespace) -> int:
    from .config import load_config
    from .limits import save_limits
    from .phase1 import format_baseline_report, run_baseline

    config = load_config(args.config)
    result = run_baseline(config, args.files, robust=args.estimator == "median-moving-range", strict=args.strict,
                          config_path=args.config, show_progress=sys.stderr.isatty())  # fmt: skip
    save_limits(result.limits, args.output)
    print(format_baseline_report(result))
    print(f"wrote {args.output}")
    if result.refused and args.strict:
        return 1
    return 0


def cmd_replay(args: argparse.Namespace) -> int:
    from .config import load_config
    from .replay import format_summary, run_replay, write_outputs

    config = load_config(args.config)
    limits = _load_limits(args.limits)
    result = run_replay(config, limits, args.files, strict=args.strict, show_progress=sys.stderr.isatty())
    review_lines: list[str] = []
    if args.report or args.incidents:
        from .review import review_replay

        review_lines = review_replay(result, config, report_path=args.report, incidents_path=args.incidents)
    else:
        review_lines = _design_check_lines(result)
    events_path, summary_path = write_outputs(result, args.out)
    print(format_summary(result.summary))
    for line in review_lines:
        print(line)
    print(f"wrote {events_path} and {summary_path}")
    return 0


def _design_check_lines(result: ReplayResult) -> list[str]:
    """Raises beside the design's in-control rate, per tag and detector (summary.json: design_check)."""
    from .review.design_check import design_rows

    rows = design_rows(result.pipeline)
    result.summary["design_check"] = [row.to_dict() for row in rows]
    lines = []
    for row in rows:
        if row.flag:
            expected = row.expected_raises
            lines.append(f"{row.flag}: {row.tag} {row.detector}: {row.raises} raises where about "
                         f"{expected:.2g} were designed - a real change, autocorrelation, or limits that no "
                         "longer fit")  # fmt: skip
    return lines


def build_parser(features: Sequence[str] | None = None) -> argparse.ArgumentParser:
    """The parser with the core commands and the given feature modules (default: all of them)."""
    parser = argparse.ArgumentParser(
        prog="streamguard",
        description="Streaming change detection for sensor historians and MQTT.",
    )
    parser.add_argument("--version", action="version", version=f"streamguard {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    check = sub.add_parser("check", help="validate a config (and a limits file)")
    check.add_argument("config")
    check.add_argument("--limits", help="limits file to validate against the config")
    check.set_defaults(handler=cmd_check)

    baseline = sub.add_parser("baseline", help="phase I: estimate and freeze limits from baseline windows")
    baseline.add_argument("--config", "-c", required=True)
    baseline.add_argument("--output", "-o", required=True, help="limits file to write (YAML)")
    baseline.add_argument("--estimator", choices=["moving-range", "median-moving-range"], default="moving-range",
                          help="sigma for individuals: mean moving range / d2, or the robust median moving range")
    baseline.add_argument("--strict", action="store_true", help="stop at the first bad row; exit 1 if a tag is refused")
    baseline.add_argument("files", nargs="+", metavar="FILE")
    baseline.set_defaults(handler=cmd_baseline)

    replay = sub.add_parser("replay", help="run historian files through the monitoring pipeline")
    replay.add_argument("--config", "-c", required=True)
    replay.add_argument("--limits", "-l")
    replay.add_argument("--out", "-o", required=True, help="output folder for events.jsonl and summary.json")
    replay.add_argument("--strict", action="store_true", help="stop at the first bad row with file:line")
    replay.add_argument("--report", metavar="HTML", help="write a self-contained HTML review of the replay")
    replay.add_argument("--incidents", metavar="CSV", help="known incidents (tag,start,end,label) to score detection")
    replay.add_argument("files", nargs="+", metavar="FILE")
    replay.set_defaults(handler=cmd_replay)

    for module_name in _FEATURES if features is None else features:
        try:
            module = importlib.import_module(module_name)
        except ModuleNotFoundError as exc:
            if exc.name and module_name.startswith(exc.name):
                continue
            raise
        module.register(sub)
    return parser


_CORE = ("check", "baseline", "replay")


def _features_for(words: list[str]) -> list[str] | None:
    """The feature module a command line needs; None (all) for help, version or an unknown command."""
    if words and words[0] in _CORE:
        return []
    for module_name, commands in _FEATURES.items():
        if words and words[0] in commands:
            return [module_name]
    return None


def main(argv: Sequence[str] | None = None) -> int:
    words = list(sys.argv[1:] if argv is None else argv)
    parser = build_parser(_features_for(words))
    args = parser.parse_args(words)
    handler = getattr(args, "handler", None)
    if handler is None:
        parser.print_help()
        return 2
    try:
        return int(handler(args) or 0)
    except StreamguardError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return exc.exit_code
    except ValueError as exc:
        # Durations and times given on the command line.
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:
        # Output folders and files we were asked to write.
        print(f"error: {exc.filename or ''}: {exc.strerror or exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())

