"""Phase I: estimate each tag's centre and sigma from a clean baseline window, and freeze them.

Samples pass the same quality gate and subgrouping as in monitoring (bad, stale, out-of-range and
out-of-order data never enter a baseline). Sigma comes from short-term variation, not the overall
standard deviation, so that a drift inside the window does not inflate the limits: MR-bar / d2(2) for
individuals (or the median moving range / 0.954, robust to isolated spikes), s-bar / c4(n) for
subgroups. Points beyond the 3-sigma limits are dropped and the estimate repeated, a few passes at
most, each reported. A tag is refused, by name, with too few points (common practice: 100
individuals or 25 subgroups) or a flat baseline. The lag-1 autocorrelation is reported because limits
set on autocorrelated data alarm far more often than designed.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from . import __version__, constants
from .config import BaselineWindow, Config, config_fingerprint
from .gate import REASONS
from .limits import EstimationPass, InputFile, LimitsFile, TagLimits, file_sha256, limits_version
from .pipeline import Pipeline
from .progress import Progress
from .sources.historian import ReadProblems, read_historian
from .timeparse import format_time
from .types import Batch

MIN_INDIVIDUALS = 100  # common practice
MIN_SUBGROUPS = 25  # common practice
MAX_PASSES = 5
MAX_DROP_SHARE = 0.05  # beyond this a pass stops trimming and warns instead
AUTOCORRELATION_WARNING = 0.5
ACF_LAGS = 10
_D2_2 = 2.0 / math.sqrt(math.pi)
_MEDIAN_MR = math.sqrt(2.0) * 0.6744897501960817  # median of |N(0,2)|: 0.954


def c4(n: np.ndarray) -> np.ndarray:
    """c4 for each subgroup size, from the chart-constants module (computed once per distinct n)."""
    sizes, where = np.unique(np.asarray(n, dtype=int), return_inverse=True)
    return np.array([constants.c4(int(m)) for m in sizes])[where]


@dataclass
class _Collected:
    mean: list[np.ndarray] = field(default_factory=list)
    sd: list[np.ndarray] = field(default_factory=list)
    n: list[np.ndarray] = field(default_factory=list)
    restart: list[np.ndarray] = field(default_factory=list)
    ts: list[np.ndarray] = field(default_factory=list)


def autocorrelation(x: np.ndarray, lags: int = ACF_LAGS) -> list[float]:
    """Sample ACF r_1..r_lags (Box & Jenkins' estimator: divisor n, overall mean)."""
    x = np.asarray(x, dtype=float)
    if x.shape[0] < lags + 2:
        return []
    d = x - x.mean()
    denominator = float(d @ d)
    if denominator == 0:
        return []
    return [float(d[:-k] @ d[k:] / denominator) for k in range(1, lags + 1)]


def autocorrelation_remedy(acf: list[float], threshold: float = 0.2) -> str:
    """Two remedies with numbers: a subgroup long enough that consecutive means are nearly independent
    (the AR(1) block-mean correlation of ``comparison.autocorrelation``), or charting AR(1) residuals."""
    from .comparison.autocorrelation import block_mean_correlation, choose_block_length

    phi = acf[0] if acf else 0.0
    if not 0 < phi < 1:
        return "none needed"
    m = choose_block_length(phi, threshold)
    return (f"(a) subgroups of about {m} consecutive points (means then correlate at about "
            f"{block_mean_correlation(m, phi):.2f}; "
            f"limits on subgroup means are standard errors, not the spread of the product), or "
            f"(b) `model: ar1` for this tag: chart one-step residuals with phi = {phi:.2f} frozen in the limits file")


def effective_points(n: int, r1: float) -> float:
    """AR(1) approximation n (1 - r1) / (1 + r1): how many independent points the data is worth."""
    r = min(max(r1, -0.99), 0.99)
    return n * (1 - r) / (1 + r)


def _estimate(mean: np.ndarray, sd: np.ndarray, n: np.ndarray, restart: np.ndarray,
              robust: bool) -> tuple[float, float, str]:  # fmt: skip
    individuals = bool(np.all(n == 1))
    centre = float(np.sum(mean * n) / np.sum(n))
    if individuals:
        ranges = np.abs(np.diff(mean))
        ranges = ranges[~restart[1:]]  # a moving range never spans a gap
        if ranges.size == 0:
            return centre, 0.0, "moving_range"
        if robust:
            return centre, float(np.median(ranges) / _MEDIAN_MR), "median_moving_range"
        return centre, float(ranges.mean() / _D2_2), "moving_range"
    ok = n >= 2
    ratios = sd[ok] / c4(n[ok])
    if ratios.size == 0:
        return centre, 0.0, "s_bar_c4"
    if robust:
        return centre, float(np.median(ratios)), "median_s_c4"
    return centre, float(ratios.mean()), "s_bar_c4"


def estimate_ar1(name: str, mean: np.ndarray, restart: np.ndarray) -> tuple[TagLimits | None, str]:
    """AR(1) model of the charted points: centre, phi = lag-1 ACF, and the sigma of one-step residuals
    r_t = (x_t - mu) - phi (x_(t-1) - mu), which are nearly independent, so limits on them alarm at the
    designed rate (the residual chart of Alwan & Roberts 1988; Montgomery, Introduction to SQC, ch. 10).
    sigma is the total standard deviation of the points: the process spread. No trimming: on
    autocorrelated data a 3-sigma screen removes the process's own excursions."""
    if mean.shape[0] < MIN_INDIVIDUALS:
        return None, (f"{name}: only {mean.shape[0]} points in the baseline window; "
                      f"need at least {MIN_INDIVIDUALS} (common practice)")
    centre = float(mean.mean())
    sigma = float(mean.std(ddof=1))
    if not sigma > 0:
        return None, f"{name}: sigma is zero in the baseline window (flat or stuck signal); choose another window"
    acf = autocorrelation(mean)
    phi = acf[0] if acf else 0.0
    d = mean - centre
    residuals = d[1:] - phi * d[:-1]
    pairs = ~restart[1:]
    ranges = np.abs(np.diff(residuals[pairs]))
    residual_sigma = float(ranges.mean() / _D2_2) if ranges.size else 0.0
    if not residual_sigma > 0:
        return None, f"{name}: the AR(1) residuals have no spread; choose another window"
    residual_acf = autocorrelation(residuals[pairs])
    warnings = []
    if residual_acf and abs(residual_acf[0]) > 0.2:
        warnings.append(
            f"AR(1) residuals still correlated at lag 1 ({residual_acf[0]:.2f}): AR(1) fits this tag poorly"
        )
    limits = TagLimits(
        mean=centre, sigma=sigma, subgroup_size=1.0, estimator="ar1_residual_moving_range",
        points_used=int(mean.shape[0]), lag1_autocorrelation=phi, autocorrelation=acf,
        effective_points=effective_points(int(mean.shape[0]), phi), warnings=warnings,
        model="ar1", ar1_phi=phi, residual_sigma=residual_sigma,
        passes=[EstimationPass(number=1, mean=centre, sigma=sigma, points_used=int(mean.shape[0]),
                               points_dropped=0)],
    )  # fmt: skip
    return limits, ""


def estimate_tag(name: str, mean: np.ndarray, sd: np.ndarray, n: np.ndarray, restart: np.ndarray,
                 robust: bool = False, model: str = "none") -> tuple[TagLimits | None, str]:  # fmt: skip
    """Iterated estimate for one tag; returns (limits, "") or (None, reason refused)."""
    if model == "ar1":
        return estimate_ar1(name, mean, restart)
    individuals = bool(np.all(n == 1))
    minimum = MIN_INDIVIDUALS if individuals else MIN_SUBGROUPS
    what = "individual points" if individuals else "subgroups"
    if mean.shape[0] < minimum:
        return None, (f"{name}: only {mean.shape[0]} {what} in the baseline window; "
                      f"need at least {minimum} (common practice)")
    keep = np.ones(mean.shape[0], bool)
    untrimmed_share = 0.0
    passes: list[EstimationPass] = []
    centre = sigma = 0.0
    estimator = ""
    for number in range(1, MAX_PASSES + 1):
        # Dropping a point breaks the moving range across it, as a gap does.
        gaps = restart.copy()
        gaps[1:] |= ~keep[:-1]
        centre, sigma, estimator = _estimate(mean[keep], sd[keep], n[keep], gaps[keep], robust)
        if not (sigma > 0) or not math.isfinite(sigma):
            return None, f"{name}: sigma is zero in the baseline window (flat or stuck signal); choose another window"
        outside = keep & (np.abs(mean - centre) > 3.0 * sigma / np.sqrt(n))
        passes.append(EstimationPass(number=number, mean=centre, sigma=sigma, points_used=int(keep.sum()),
                                     points_dropped=int(outside.sum())))  # fmt: skip
        if not outside.any():
            break
        if outside.sum() > MAX_DROP_SHARE * keep.sum():
            # So many points beyond 3 sigma means the window is not in control (or the data are
            # autocorrelated, which makes short-term sigma too small); trimming would only hide that.
            untrimmed_share = float(outside.sum() / keep.sum())
            passes[-1] = passes[-1].model_copy(update={"points_dropped": 0})
            break
        keep &= ~outside
        if keep.sum() < minimum:
            return None, f"{name}: fewer than {minimum} {what} left after dropping points beyond 3 sigma"
    used = mean[keep]
    acf = autocorrelation(used)
    r1 = acf[0] if acf else None
    warnings = []
    if r1 is not None and r1 > AUTOCORRELATION_WARNING:
        warnings.append(
            f"lag-1 autocorrelation {r1:.2f} > {AUTOCORRELATION_WARNING}: limits on such data alarm far more often "
            f"than designed. Remedies: {autocorrelation_remedy(acf)}"
        )
    if untrimmed_share:
        warnings.append(
            f"{untrimmed_share:.1%} of points lie beyond the 3-sigma limits, more than {MAX_DROP_SHARE:.0%}: the "
            "baseline window is not in control or the data are autocorrelated; points were not trimmed"
        )
    mean_n = float(np.mean(n[keep]))
    limits = TagLimits(
        mean=centre,
        sigma=sigma,
        subgroup_size=mean_n,
        standard_error_of_subgroup_mean=None if individuals else sigma / math.sqrt(mean_n),
        estimator=estimator,
        points_used=int(keep.sum()),
        passes=passes,
        lag1_autocorrelation=r1,
        autocorrelation=acf,
        effective_points=effective_points(int(keep.sum()), r1) if r1 is not None else None,
        warnings=warnings,
    )
    return limits, ""


@dataclass
class BaselineResult:
    limits: LimitsFile
    refused: dict[str, str]
    problems: ReadProblems
    skipped: list[str]  # tags without a baseline window (given in config, or none at all)


def run_baseline(config: Config, paths: Sequence[str | Path], *, robust: bool = False, strict: bool = False,
                 config_path: str | None = None, show_progress: bool = False) -> BaselineResult:  # fmt: skip
    """Read the files once; estimate every tag whose settings name a baseline window.

    Samples go through the monitoring pipeline's own stages before the detectors (gate, pairs,
    subgroups), so a baseline is built from exactly the points monitoring will chart.
    """
    from .replay import input_settings

    pipeline = Pipeline(config, None, all_active=True)
    table = pipeline.tags
    samples = np.zeros((0, len(REASONS)), np.int64)
    collected: dict[int, _Collected] = {}
    period: dict[int, list[np.ndarray]] = {}
    problems = ReadProblems()
    progress = Progress(len(paths), enabled=show_progress)
    window_start = np.zeros(0, np.int64)
    window_end = np.zeros(0, np.int64)
    try:
        for chunk in read_historian(list(paths), input_settings(config), strict=strict, problems=problems):
            index = table.lookup(chunk.names)
            n_tags = len(table)
            if window_start.shape[0] < n_tags:
                old = window_start.shape[0]
                window_start = np.resize(window_start, n_tags)
                window_end = np.resize(window_end, n_tags)
                for t in range(old, n_tags):
                    b = table.settings[t].baseline
                    window_start[t], window_end[t] = (b.start_ns, b.end_ns) if isinstance(b, BaselineWindow) else (0, 0)
                grown = np.zeros((n_tags, len(REASONS)), np.int64)
                grown[: samples.shape[0]] = samples
                samples = grown
            batch = Batch.of(index[chunk.codes], chunk.ts, chunk.value, chunk.quality)
            prepared = pipeline.prepare(batch)
            for tag, ts, reason in prepared.samples:
                inside = (ts >= window_start[tag]) & (ts < window_end[tag])
                np.add.at(samples, (tag[inside], reason[inside]), 1)
                used = inside & (reason == 0)
                order = np.argsort(tag[used], kind="stable")
                used_tag, used_ts = tag[used][order], ts[used][order]
                for group in np.split(np.arange(used_tag.shape[0]), np.flatnonzero(np.diff(used_tag)) + 1):
                    if group.size > 1:
                        period.setdefault(int(used_tag[group[0]]), []).append(np.diff(used_ts[group]))
            points = prepared.points
            keep = (points.ts >= window_start[points.tag]) & (points.ts < window_end[points.tag])
            order = np.flatnonzero(keep)[np.argsort(points.tag[keep], kind="stable")]
            bounds = np.flatnonzero(np.diff(points.tag[order])) + 1
            for group in np.split(order, bounds):
                if group.size == 0:
                    continue
                t = int(points.tag[group[0]])
                c = collected.setdefault(t, _Collected())
                c.mean.append(points.mean[group])
                c.sd.append(points.sd[group])
                c.n.append(points.n[group])
                c.restart.append(points.restart[group])
                c.ts.append(points.ts[group])
            progress.update(len(chunk.codes), chunk.source)
    finally:
        progress.close()

    result_tags: dict[str, TagLimits] = {}
    refused: dict[str, str] = {}
    skipped: list[str] = []
    for t, name in enumerate(table.names):
        baseline = table.settings[t].baseline
        if not isinstance(baseline, BaselineWindow):
            skipped.append(name)
            continue
        found = collected.get(t)
        if found is None:
            refused[name] = f"{name}: no usable samples between {baseline.start} and {baseline.end}"
            continue
        c = found
        limits, why = estimate_tag(name, np.concatenate(c.mean), np.concatenate(c.sd), np.concatenate(c.n),
                                   np.concatenate(c.restart), robust, table.settings[t].model)  # fmt: skip
        if limits is None:
            refused[name] = why
            continue
        excluded = {REASONS[r]: int(samples[t, r]) for r in range(1, len(REASONS))
                    if samples[t, r] and REASONS[r] != "no_limits"}  # fmt: skip
        spacing = np.concatenate(period[t]) if t in period else np.zeros(0)
        result_tags[name] = limits.model_copy(update={
            "window_start": baseline.start,
            "window_end": baseline.end,
            "samples_used": int(samples[t, 0]),
            "samples_excluded": excluded,
            "sample_period_s": float(np.median(spacing) / 1e9) if spacing.size else None,
        })  # fmt: skip
    version = limits_version({k: (v.mean, v.sigma) for k, v in result_tags.items()})
    estimators = sorted({v.estimator for v in result_tags.values()})
    limits_file = LimitsFile(
        limits_version=version,
        created=format_time(int(datetime.now(UTC).timestamp() * 1e9)),
        streamguard_version=__version__,
        config_path=config_path,
        config_fingerprint=config_fingerprint(config),
        estimator=", ".join(estimators),
        inputs=[InputFile(path=str(p), sha256=file_sha256(p), bytes=Path(p).stat().st_size) for p in paths],
        tags=result_tags,
        refused=refused,
    )
    return BaselineResult(limits_file, refused, problems, skipped)


def format_baseline_report(result: BaselineResult) -> str:
    header = (f"{'tag':<16} {'n':>3} {'points':>7} {'centre':>12} {'sigma (indiv.)':>15} "
              f"{'std. error of mean':>18} {'lag-1 r':>8} {'n_eff':>7}  passes")  # fmt: skip
    lines = [header, "-" * len(header)]
    for name, t in result.limits.tags.items():
        se = f"{t.standard_error_of_subgroup_mean:.4g}" if t.standard_error_of_subgroup_mean else "-"
        r1 = f"{t.lag1_autocorrelation:.2f}" if t.lag1_autocorrelation is not None else "-"
        neff = f"{t.effective_points:.0f}" if t.effective_points is not None else "-"
        dropped = "/".join(str(p.points_dropped) for p in t.passes)
        lines.append(f"{name:<16} {t.subgroup_size:>3.3g} {t.points_used:>7} {t.mean:>12.5g} {t.sigma:>15.4g} "
                     f"{se:>18} {r1:>8} {neff:>7}  {len(t.passes)} (dropped {dropped})")  # fmt: skip
    lines.append("")
    lines.append("sigma (indiv.) is the process spread; the standard error of a subgroup mean is sigma/sqrt(n) and")
    lines.append("describes only how much subgroup means scatter - it is not the spread of the product.")
    for name, t in result.limits.tags.items():
        for warning in t.warnings:
            lines.append(f"warning: {name}: {warning}")
    for why in result.refused.values():
        lines.append(f"refused: {why}")
    lines.append(f"limits version {result.limits.limits_version}: {len(result.limits.tags)} tags estimated, "
                 f"{len(result.refused)} refused, {len(result.skipped)} without a baseline window")  # fmt: skip
    return "\n".join(lines)
