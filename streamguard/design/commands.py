"""The ``arl`` and ``tune`` subcommands: run lengths of a detector setting, and settings from a budget.

``register(subparsers)`` adds both to the main parser; each sets ``handler`` to a function taking the
parsed arguments and returning the exit code. Wrong arguments raise UsageError, which the CLI turns
into a message and an exit code.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any, TextIO

from ..durations import format_duration
from ..errors import UsageError
from .engine import DETECTORS, normalise_params, run_length
from .results import RunLength
from .tuning import TuningOption, TuningPlan, tune

_DETECTOR_OPTIONS = {
    "cusum": ("k", "h", "headstart", "side"),
    "ewma": ("lambda_", "L", "limits"),
    "shewhart": ("limit", "rules", "run_length"),
}
_OPTION_NAMES = {
    "k": "--k", "h": "--h", "headstart": "--headstart", "side": "--side", "lambda_": "--lambda", "L": "--L",
    "limits": "--limits", "limit": "--limit", "rules": "--rules", "run_length": "--run-length",
}  # fmt: skip


def register(subparsers: Any) -> None:
    """Add ``arl`` and ``tune`` to an argparse subparsers object."""
    arl_parser = subparsers.add_parser(
        "arl",
        help="run lengths (ARL, quantiles) of a detector setting at given shifts",
        description="Average run length, its spread and quantiles of one detector setting, in chart points. "
        "Shifts are in sigma of individual values; with subgroups of n the chart sees shift * sqrt(n).",
        allow_abbrev=False,
    )
    arl_parser.add_argument("detector", help="cusum, ewma or shewhart")
    cusum = arl_parser.add_argument_group("cusum")
    cusum.add_argument("--k", help="reference value, in standard errors")
    cusum.add_argument("--h", help="decision interval, in standard errors")
    cusum.add_argument("--headstart", help="start value as a fraction of h (default 0)")
    cusum.add_argument("--side", help="two (default), upper or lower")
    ewma = arl_parser.add_argument_group("ewma")
    ewma.add_argument("--lambda", dest="lambda_", help="smoothing weight, 0 < lambda <= 1")
    ewma.add_argument("--L", dest="L", help="limit multiple")
    ewma.add_argument("--limits", help="exact (default) or asymptotic")
    shewhart = arl_parser.add_argument_group("shewhart")
    shewhart.add_argument("--limit", help="rule 1 limit multiple (default 3)")
    shewhart.add_argument("--rules", help="comma-separated rules, e.g. we1,we2 (default we1)")
    shewhart.add_argument("--run-length", dest="run_length", help="points in a same-side run for we4 (default 8)")
    arl_parser.add_argument("--subgroup-size", dest="subgroup_size", default="1", help="points per subgroup")
    arl_parser.add_argument("--shift", default="0,0.5,1,2", help="comma-separated shifts (default 0,0.5,1,2)")
    arl_parser.add_argument("--json", action="store_true", help="machine-readable output")
    arl_parser.set_defaults(handler=run_arl_command)

    tune_parser = subparsers.add_parser(
        "tune",
        help="CUSUM, EWMA and Shewhart settings for a false-alarm budget",
        description="Solve detector settings so that each alone raises at most the budgeted false alarms, "
        "and report how fast each finds the target shift.",
        allow_abbrev=False,
    )
    tune_parser.add_argument("--false-alarms", dest="false_alarms", required=True,
                             help="budget per tag, alarms/duration, e.g. 1/30d")  # fmt: skip
    tune_parser.add_argument("--period", required=True, help="sample period, e.g. 1s")
    group = tune_parser.add_mutually_exclusive_group()
    group.add_argument("--subgroup-size", dest="subgroup_size", help="samples per chart point")
    group.add_argument("--subgroup-window", dest="subgroup_window", help="chart point per time window, e.g. 60s")
    tune_parser.add_argument("--shift", required=True, help="shift to detect, in sigma of individual values")
    tune_parser.add_argument("--within", help="detection time to meet, e.g. 1h")
    tune_parser.add_argument("--rules", default="we1", help="Shewhart rules to tune with (default we1)")
    tune_parser.add_argument("--run-length", dest="run_length", default="8", help="we4 run length (default 8)")
    tune_parser.add_argument("--json", action="store_true", help="machine-readable output")
    tune_parser.add_argument("--autocorrelation", help="lag-1 autocorrelation of the tag's samples (from the "
                             "baseline report); above 0.5 the plan is flagged and remedies proposed")  # fmt: skip
    tune_parser.set_defaults(handler=run_tune_command)


def _finite_or_none(value: Any) -> Any:
    """JSON has no infinity: an ARL beyond double precision (> 1e14 points) is written as null."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {key: _finite_or_none(item) for key, item in value.items()}
    if isinstance(value, list | tuple):
        return [_finite_or_none(item) for item in value]
    return value


def _float(option: str, text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise UsageError(f"{option}: expected a number, got {text!r}") from None
    if not math.isfinite(value):
        raise UsageError(f"{option}: expected a finite number, got {text!r}")
    return value


def _whole(option: str, text: str) -> int:
    try:
        return int(text)
    except ValueError:
        raise UsageError(f"{option}: expected a whole number, got {text!r}") from None


def _rules(text: str) -> list[str]:
    return [part.strip() for part in text.split(",") if part.strip()]


def _arl_params(args: argparse.Namespace) -> dict[str, Any]:
    detector = args.detector
    if detector not in DETECTORS:
        raise UsageError(f"arl: unknown detector {detector!r}; choose one of {', '.join(DETECTORS)}")
    for other, names in _DETECTOR_OPTIONS.items():
        stray = [_OPTION_NAMES[name] for name in names if other != detector and getattr(args, name) is not None]
        if stray:
            verb = "is an option" if len(stray) == 1 else "are options"
            raise UsageError(f"arl {detector}: {', '.join(stray)} {verb} of {other}, not of {detector}")
    params: dict[str, Any] = {}
    for name in _DETECTOR_OPTIONS[detector]:
        text = getattr(args, name)
        if text is None:
            continue
        key = "lambda" if name == "lambda_" else name
        if name in ("side", "limits"):
            params[key] = text
        elif name == "rules":
            params[key] = _rules(text)
        elif name == "run_length":
            params[key] = _whole(_OPTION_NAMES[name], text)
        else:
            params[key] = _float(_OPTION_NAMES[name], text)
    return normalise_params(detector, params)


def _shifts(text: str) -> list[float]:
    parts = [part.strip() for part in text.split(",") if part.strip()]
    if not parts:
        raise UsageError("--shift: give one or more shifts, e.g. 0,0.5,1,2")
    return [_float("--shift", part) for part in parts]


def _number(value: float | None) -> str:
    if value is None:
        return "-"
    if math.isinf(value):
        return "> 1e14"
    if abs(value) >= 1000:
        return f"{value:,.0f}"
    return f"{value:.4g}"


def _describe(detector: str, params: dict[str, Any]) -> str:
    if detector == "cusum":
        side = "two-sided" if params["side"] == "two" else f"{params['side']} side only"
        return f"CUSUM k={params['k']:g} h={params['h']:g} headstart={params['headstart']:g} ({side})"
    if detector == "ewma":
        return f"EWMA lambda={params['lambda']:g} L={params['L']:g} ({params['limits']} limits)"
    return (f"Shewhart limit={params['limit']:g} rules={','.join(params['rules'])} "
            f"run_length={params['run_length']}")  # fmt: skip


def _table(rows: list[list[str]], out: TextIO) -> None:
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    for row in rows:
        out.write("  ".join(cell.rjust(width) for cell, width in zip(row, widths, strict=True)).rstrip() + "\n")


def _print_run_lengths(detector: str, params: dict[str, Any], subgroup_size: int, results: list[RunLength],
                       out: TextIO) -> None:  # fmt: skip
    out.write(f"{_describe(detector, params)}, subgroup size {subgroup_size}\n")
    quantiles = sorted({q for result in results for q in result.quantiles})
    header = ["shift", "chart shift", "ARL", "SDRL", *[f"{q:.0%}" if q != 0.5 else "median" for q in quantiles],
              "steady-state ARL"]  # fmt: skip
    rows = [header]
    for result in results:
        rows.append([f"{result.shift:g}", f"{result.chart_shift:.4g}", _number(result.arl), _number(result.sdrl),
                     *[_number(result.quantiles.get(q)) for q in quantiles],
                     _number(result.steady_state_arl)])  # fmt: skip
    _table(rows, out)
    worst = max(result.tolerance for result in results)
    out.write(f"\nARL in chart points, zero state; estimated relative error below {max(worst, 1e-6):.1g}.\n")
    out.write("Steady state: the shift arrives after a long in-control run without a false alarm.\n")
    for method in dict.fromkeys(result.method for result in results):
        out.write(f"method: {method}\n")
    for note in dict.fromkeys(note for result in results for note in result.notes):
        out.write(f"note: {note}\n")


def run_arl_command(args: argparse.Namespace, out: TextIO | None = None) -> int:
    out = out or sys.stdout
    params = _arl_params(args)
    subgroup_size = _whole("--subgroup-size", args.subgroup_size)
    if subgroup_size < 1:
        raise UsageError(f"--subgroup-size: must be >= 1, got {subgroup_size}")
    results = [run_length(args.detector, params, shift, subgroup_size) for shift in _shifts(args.shift)]
    if args.json:
        document = {"detector": args.detector, "params": params, "subgroup_size": subgroup_size,
                    "results": [result.to_dict() for result in results]}  # fmt: skip
        out.write(json.dumps(_finite_or_none(document), indent=2) + "\n")
    else:
        _print_run_lengths(args.detector, params, subgroup_size, results, out)
    return 0


def _settings(option: TuningOption) -> str:
    return " ".join(
        f"{key}={','.join(value) if isinstance(value, list) else value}" for key, value in option.params.items()
    )


def _print_plan(plan: TuningPlan, out: TextIO) -> None:
    grouping = (f"subgroups of {plan.subgroup_size} samples over {plan.subgroup_window}" if plan.subgroup_window
                else f"subgroups of {plan.subgroup_size}" if plan.subgroup_size > 1 else "individual values")
    out.write(f"Budget {plan.budget} per tag, one chart point every {format_duration(plan.point_period_s * 1e9)} "
              f"({grouping}): in-control ARL of {plan.required_arl:,.0f} points.\n")  # fmt: skip
    out.write(f"Target shift {plan.shift:g} sigma of individual values = {plan.chart_shift:.4g} standard errors "
              "on the chart.\n\n")  # fmt: skip
    within = f"within {format_duration(plan.within_s * 1e9)}" if plan.within_s is not None else None
    header = ["detector", "settings", "in-control ARL", "delay (points)", "delay (time)"]
    rows = [header + ([within] if within else [])]
    for option in plan.options:
        delay_time = format_duration(option.detection_delay_s * 1e9) if option.detection_delay_s else "-"
        meets = "-" if option.meets_within is None else ("yes" if option.meets_within else "no")
        row = [option.detector, _settings(option) if option.feasible else "not feasible",
               _number(option.in_control_arl), _number(option.detection_arl), delay_time]  # fmt: skip
        rows.append(row + ([meets] if within else []))
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    for row in rows:
        cells = [row[0].ljust(widths[0]), row[1].ljust(widths[1])]
        cells += [cell.rjust(width) for cell, width in zip(row[2:], widths[2:], strict=True)]
        out.write("  ".join(cells).rstrip() + "\n")
    out.write("\nDelay = zero-state ARL at the target shift, times the point period.\n")
    for option in plan.options:
        if option.note:
            out.write(f"{option.detector}: {option.note}\n")
    out.write("\nEach option spends the whole budget alone; enabling several adds their false-alarm rates.\n")
    for option in plan.options:
        if option.feasible:
            out.write(f"\n# {option.detector}\n{plan.yaml_snippet(option)}")


def run_tune_command(args: argparse.Namespace, out: TextIO | None = None) -> int:
    out = out or sys.stdout
    subgroup_size = None if args.subgroup_size is None else _whole("--subgroup-size", args.subgroup_size)
    plan = tune(
        false_alarms=args.false_alarms,
        period=args.period,
        shift=_float("--shift", args.shift),
        subgroup_size=subgroup_size,
        subgroup_window=args.subgroup_window,
        within=args.within,
        rules=_rules(args.rules),
        run_length=_whole("--run-length", args.run_length),
    )
    caution = _autocorrelation_caution(args.autocorrelation)
    if args.json:
        data = _finite_or_none(plan.to_dict())
        if caution:
            data["autocorrelation_caution"] = caution
        out.write(json.dumps(data, indent=2) + "\n")
    else:
        _print_plan(plan, out)
        if caution:
            out.write("\n" + caution + "\n")
    return 0


def _autocorrelation_caution(text: str | None) -> str:
    """Run lengths assume independent points; say so, with numbers, when the tag's samples are not."""
    if text is None:
        return ""
    r1 = _float("--autocorrelation", text)
    if not -1.0 < r1 < 1.0:
        raise UsageError(f"--autocorrelation must lie between -1 and 1, got {text}")
    if r1 <= 0.5:
        return ""
    from ..phase1 import autocorrelation_remedy

    return (f"caution: lag-1 autocorrelation {r1:.2f}: these settings assume independent points and will alarm "
            f"far more often than budgeted on this tag. Remedies: {autocorrelation_remedy([r1])}")

