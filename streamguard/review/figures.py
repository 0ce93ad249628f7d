"""The report's pictures, drawn with matplotlib (Agg, no display) and returned as inline SVG text.

matplotlib is imported here and only here, inside the functions, so the pipeline, the service and the
replay never need it. The look is streamguard's own: a palette picked so that each detector differs in
lightness as well as hue (it survives colour blindness and a grey printer), a marker shape per
detector and per event kind, light dotted guides, and no boxes. Long series are thinned for display
only, keeping each display bucket's lowest and highest value so no spike disappears; every figure in
the summary tables is computed on all the data.
"""

from __future__ import annotations

import io
import re
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

    from .alarm_load import AlarmLoad
    from .design_check import DesignRow
    from .incidents import Incident, IncidentScores
    from .tag_traces import TagTrace

# Palette: lightness steps of roughly 15 (CIE L*) between detectors, hues apart for every common form of
# colour blindness; the names say what each colour is for, not what it looks like.
INK = "#23233a"  # sample values, text
PAPER = "#fdfcf8"
RULE = "#8d8a80"  # centre lines, axes
GUIDE = "#dcd8cc"  # grid
EXCLUDED = "#8a8378"  # samples the gate kept out
INCIDENT_FILL = "#efe6d2"
INCIDENT_EDGE = "#b9a67c"
DETECTOR_COLOURS = {
    "shewhart": "#173f6b",  # deep blue, L* ~ 27
    "cusum": "#b04a1c",  # burnt orange, L* ~ 45
    "ewma": "#2b8a8a",  # blue-green, L* ~ 52
    "spread": "#d6a019",  # amber, L* ~ 70
    "quality": "#6f6a8f",  # muted violet, L* ~ 46, always with its own marker
}
DETECTOR_MARKERS = {"shewhart": "o", "cusum": "s", "ewma": "D", "spread": "P", "quality": "X"}
# Hatches made of straight strokes only: dotted hatches cost a hundred times more in SVG.
DETECTOR_HATCHES = {"shewhart": "", "cusum": "///", "ewma": "\\\\\\", "spread": "++", "quality": "--"}
RAISE_UP, RAISE_DOWN, CLEAR_MARK = "^", "v", "d"
OTHER_COLOUR, OTHER_MARKER, OTHER_HATCH = "#4d4d4d", "h", "xx"  # a detector added later, until it gets its own


def colour_of(detector: str) -> str:
    return DETECTOR_COLOURS.get(detector, OTHER_COLOUR)


def marker_of(detector: str) -> str:
    return DETECTOR_MARKERS.get(detector, OTHER_MARKER)


def hatch_of(detector: str) -> str:
    return DETECTOR_HATCHES.get(detector, OTHER_HATCH)

DISPLAY_BUCKETS = 320


def _style(salt: str) -> dict[str, Any]:
    return {
        "font.family": "DejaVu Sans",
        "font.size": 8.5,
        "axes.titlesize": 9.5,
        "axes.titleweight": "bold",
        "axes.titlelocation": "left",
        "axes.labelsize": 8.5,
        "axes.labelcolor": INK,
        "axes.edgecolor": RULE,
        "axes.linewidth": 0.7,
        "axes.facecolor": PAPER,
        "axes.spines.top": False,
        "axes.spines.right": False,
        "axes.grid": True,
        "axes.axisbelow": True,
        "grid.color": GUIDE,
        "grid.linestyle": (0, (1, 2.5)),
        "grid.linewidth": 0.8,
        "xtick.color": INK,
        "ytick.color": INK,
        "xtick.major.size": 3,
        "ytick.major.size": 0,
        "legend.frameon": False,
        "legend.fontsize": 8,
        "figure.facecolor": "white",
        "svg.fonttype": "none",  # text stays text: small files, and the browser's own sans font
        "svg.hashsalt": salt,  # ids unique per figure, so several SVGs can share one page
        "path.simplify": True,
    }


def require_matplotlib() -> None:
    """Fail early, with the fix, where a report is asked for and matplotlib is not installed."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        from ..errors import UsageError

        raise UsageError("--report: the HTML report draws its figures with matplotlib, which is not installed "
                         "(pip install matplotlib)") from None


@contextmanager
def _figure(salt: str, width: float, height: float, **kwargs: Any) -> Iterator[Figure]:
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    with matplotlib.rc_context(_style(salt)):  # type: ignore[arg-type]
        yield Figure(figsize=(width, height), **kwargs)


def to_svg(figure: Figure) -> str:
    """The figure as an <svg> element for inlining: no XML prolog, no metadata, scalable width, compact paths."""
    buffer = io.StringIO()
    figure.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None, "Format": None, "Type": None})
    text = buffer.getvalue()
    text = text[text.index("<svg"):]
    text = re.sub(r"<metadata>.*?</metadata>\s*", "", text, flags=re.S)
    text = re.sub(r'(<svg[^>]*?) width="[^"]*pt" height="[^"]*pt"', r"\1", text, count=1)
    return _compact(text)


_NUMBER = re.compile(r"-?\d+\.\d+")


def _round(match: re.Match[str]) -> str:
    text = f"{float(match.group()):.1f}"
    return text[:-2] if text.endswith(".0") else text


def _compact_path(match: re.Match[str]) -> str:
    """A path's coordinates to 0.1 pt (a tenth of a point is far below a screen pixel), runs of line-tos merged."""
    d = _NUMBER.sub(_round, match.group(1))
    if not re.search(r"[CQcq]", d):  # only straight segments: after M, bare pairs are line-tos
        d = re.sub(r"\s*\n?L ", " ", d)
    return ' d="' + re.sub(r"\s+", " ", d).strip() + '"'


def _compact(svg: str) -> str:
    svg = re.sub(r' d="([^"]*)"', _compact_path, svg)
    svg = re.sub(r' (x|y)="(-?\d+\.\d+)"', lambda m: f' {m.group(1)}="{_NUMBER.sub(_round, m.group(2))}"', svg)
    return re.sub(r">\s+<", "><", svg)


def envelope(x: np.ndarray, y: np.ndarray, buckets: int = DISPLAY_BUCKETS) -> tuple[np.ndarray, np.ndarray]:
    """Thin a series for drawing: per bucket of consecutive points, its lowest and highest, in time order."""
    n = x.shape[0]
    if n <= 2 * buckets:
        return x, y
    size = -(-n // buckets)
    pad = size * buckets - n
    filled = np.concatenate([y, np.full(pad, np.nan)]).reshape(buckets, size)
    valid = ~np.all(np.isnan(filled), axis=1)
    low = np.nanargmin(np.where(np.isnan(filled), np.inf, filled), axis=1)
    high = np.nanargmax(np.where(np.isnan(filled), -np.inf, filled), axis=1)
    first = np.minimum(low, high)
    second = np.maximum(low, high)
    base = np.arange(buckets) * size
    index = np.stack([base + first, base + second], axis=1)[valid].reshape(-1)
    index = np.minimum(index, n - 1)
    return x[index], y[index]


def _times(ns: np.ndarray | Sequence[int]) -> np.ndarray:
    return np.asarray(ns, dtype=np.int64).astype("datetime64[ns]")


def _time_axis(ax: Axes) -> None:
    import matplotlib.dates as mdates

    locator = mdates.AutoDateLocator(minticks=3, maxticks=7)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, show_offset=True))


def _few_ticks(count: int) -> Any:
    from matplotlib.ticker import MaxNLocator

    return MaxNLocator(nbins=count, steps=[1, 2, 2.5, 5, 10])


def _unit_label(what: str, units: str | None) -> str:
    return f"{what} [{units}]" if units else what


# ---------------------------------------------------------------------------------------------------
# Whole-set figures


def alarm_rate_figure(load: AlarmLoad, salt: str = "rate") -> str:
    """Alarms per 10-minute window over the period, with the flood line and the average."""
    counts = load.window_counts.astype(np.float64)
    starts = load.window_start_ns + np.arange(counts.shape[0], dtype=np.int64) * (10 * 60 * 10**9)
    thinned = counts.shape[0] > 2 * DISPLAY_BUCKETS
    with _figure(salt, 9.6, 2.9) as fig:
        ax = fig.add_axes((0.07, 0.2, 0.9, 0.66))
        if thinned:
            size = -(-counts.shape[0] // DISPLAY_BUCKETS)
            pad = size * DISPLAY_BUCKETS - counts.shape[0]
            peaks = np.concatenate([counts, np.zeros(pad)]).reshape(DISPLAY_BUCKETS, size).max(axis=1)
            x = _times(starts[::size][: peaks.shape[0]])
            y = peaks[: x.shape[0]]
        else:
            x, y = _times(starts), counts
        ax.fill_between(x, y, step="post", color=colour_of("shewhart"), alpha=0.28, linewidth=0)
        ax.step(x, y, where="post", color=colour_of("shewhart"), linewidth=0.9, label="alarms per 10 min"
                + (" (highest in each display bucket)" if thinned else ""))  # fmt: skip
        flood = load.settings.flood_above
        ax.axhline(flood, color=colour_of("cusum"), linestyle=(0, (6, 3)), linewidth=1.1,
                   label=f"flood: more than {flood}")  # fmt: skip
        ax.axhline(load.figures["alarms_per_10_minutes"], color=INK, linestyle=(0, (1, 1.5)), linewidth=1.1,
                   label=f"average {load.figures['alarms_per_10_minutes']:.2f}")  # fmt: skip
        ax.set_ylim(0, max(float(counts.max()) if counts.size else 0.0, flood) * 1.12 + 0.5)
        ax.set_ylabel("alarms per 10 min")
        ax.set_title("Alarms per 10-minute window")
        _time_axis(ax)
        ax.legend(loc="upper left", bbox_to_anchor=(0.0, -0.14), ncol=3)
        return to_svg(fig)


def top_tags_figure(load: AlarmLoad, detectors: Sequence[str], salt: str = "top") -> str:
    """The most frequent tags as stacked bars, one segment (colour and hatch) per detector."""
    tags = list(load.top_tags)[::-1]
    total = max(load.figures["alarms"], 1.0)
    height = 0.9 + 0.28 * max(len(tags), 1)
    with _figure(salt, 9.6, height) as fig:
        ax = fig.add_axes((0.16, 0.6 / height, 0.74, 1 - 1.05 / height))
        left = np.zeros(len(tags))
        from .event_arrays import DETECTORS

        for detector in [*detectors, *(d for d in DETECTORS if d not in detectors)]:
            widths = np.array([load.raises_by_tag[t].get(detector, 0) for t in tags], dtype=np.float64)
            if not widths.any():
                continue
            ax.barh(tags, widths, left=left, height=0.62, color=colour_of(detector), alpha=0.9,
                    hatch=hatch_of(detector), edgecolor="white", linewidth=0.6, label=detector)  # fmt: skip
            left += widths
        for y, value in enumerate(left):
            ax.text(value, y, f"  {int(value):,}  ({100 * value / total:.0f} %)", va="center", fontsize=7.5,
                    color=INK)  # fmt: skip
        ax.grid(axis="y", visible=False)
        ax.grid(axis="x", visible=True)
        ax.set_xlim(0, max(float(left.max()) if left.size else 1.0, 1.0) * 1.28)
        ax.set_xlabel("alarms (raises)")
        ax.set_title(f"The {len(tags)} most frequent tags")
        ax.legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=5, borderaxespad=0.2)
        return to_svg(fig)


def design_figure(rows: Sequence[DesignRow], salt: str = "design") -> str | None:
    """Observed against designed raises per day, per tag and detector, on log scales."""
    usable = [r for r in rows if r.designed_interval_ns and r.raises_per_day is not None]
    if not usable:
        return None
    designed = np.array([86400e9 / (r.designed_interval_ns or 1.0) for r in usable])
    observed = np.array([r.raises_per_day or 0.0 for r in usable])
    positive = observed[observed > 0]
    floor = min(float(designed.min()), float(positive.min()) if positive.size else 1.0) / 4
    top = max(float(designed.max()), float(observed.max())) * 3
    with _figure(salt, 9.6, 3.8) as fig:
        ax = fig.add_axes((0.08, 0.14, 0.55, 0.76))
        ax.set_xscale("log")
        ax.set_yscale("log")
        line = np.array([floor, top])
        ax.plot(line, line, color=RULE, linewidth=0.9, linestyle=(0, (4, 2)), label="as designed")
        ax.axhline(floor * 1.5, color=GUIDE, linewidth=6, zorder=0)
        ax.text(top / 1.1, floor * 1.5, "none raised ", va="center", ha="right", fontsize=7, color=INK)
        for detector in dict.fromkeys(r.detector for r in usable):
            mine = [i for i, r in enumerate(usable) if r.detector == detector]
            if not mine:
                continue
            x = designed[mine]
            y = np.where(observed[mine] > 0, observed[mine], floor * 1.5)
            flagged = np.array([bool(usable[i].flag) for i in mine])
            colour = colour_of(detector)
            ax.scatter(x[~flagged], y[~flagged], marker=marker_of(detector), s=26, facecolors="none",
                       edgecolors=colour, linewidths=1.0, label=f"{detector}")  # fmt: skip
            if flagged.any():
                ax.scatter(x[flagged], y[flagged], marker=marker_of(detector), s=30, color=colour,
                           label=f"{detector}, disagrees")  # fmt: skip
        ax.set_xlim(floor, top)
        ax.set_ylim(floor, top)
        ax.set_xlabel("designed in-control raises per day")
        ax.set_ylabel("observed raises per day")
        ax.set_title("Raises per day: observed against the design")
        ax.grid(axis="x", visible=True)
        ax.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0))
        return to_svg(fig)


def incident_figure(scores: IncidentScores, salt: str = "incidents") -> str | None:
    """Delay from onset to first raise, per incident (rows) and detector (marker); misses at the right."""
    rows = [i for i, st in enumerate(scores.status) if st == "scored"]
    if not rows:
        return None
    delays = [s.delay_ns for i in rows for s in scores.scores[i].values() if s.delay_ns is not None]
    positive = [d / 60e9 for d in delays if d > 0]
    low = 10 ** np.floor(np.log10(min(positive) / 1.5)) if positive else 0.1
    high = max(positive) * 2 if positive else 10.0
    low, high = float(min(low, 0.5)), max(high, 10.0)
    height = 1.1 + 0.42 * len(rows)
    with _figure(salt, 9.6, height) as fig:
        ax = fig.add_axes((0.22, 0.75 / height, 0.62, 1 - 1.15 / height))
        ax.set_xscale("log")
        missed_x = high * 2.6
        offsets = np.linspace(-0.3, 0.3, len(scores.detectors))
        labels = []
        hit: dict[str, list[tuple[float, float]]] = {d: [] for d in scores.detectors}
        missed: dict[str, list[float]] = {d: [] for d in scores.detectors}
        for y, i in enumerate(rows[::-1]):
            incident = scores.incidents[i]
            labels.append(f"{incident.tag}  {incident.label}")
            for offset, detector in zip(offsets, scores.detectors, strict=True):
                score = scores.scores[i][detector]
                if score.detected and score.delay_ns is not None:
                    hit[detector].append((max(score.delay_ns / 60e9, low), y + offset))
                else:
                    missed[detector].append(y)
        for detector in scores.detectors:
            colour, marker = colour_of(detector), marker_of(detector)
            if hit[detector]:
                x = np.array([h[0] for h in hit[detector]])
                y_at = np.array([h[1] for h in hit[detector]])
                ax.hlines(y_at, low, x, color=colour, linewidth=0.8, alpha=0.6)
                ax.plot(x, y_at, linestyle="none", marker=marker, markersize=5.5, color=colour, zorder=3)
            if missed[detector]:
                column = missed_x * 1.22 ** (scores.detectors.index(detector) - (len(scores.detectors) - 1) / 2)
                ax.plot([column] * len(missed[detector]), missed[detector], linestyle="none", marker=marker,
                        markersize=5, markerfacecolor="white", markeredgecolor=colour, markeredgewidth=0.9,
                        zorder=3)  # fmt: skip
        ax.axvline(high * 1.5, color=RULE, linewidth=0.7)
        ax.text(missed_x, len(rows) - 0.35, "missed", ha="center", fontsize=7.5, color=INK)
        ax.set_yticks(range(len(rows)), labels)
        ax.set_ylim(-0.6, len(rows) - 0.2)
        ax.set_xlim(low / 1.6, high * 4.5)
        from matplotlib.ticker import FuncFormatter

        ax.xaxis.set_major_formatter(FuncFormatter(lambda value, _position: f"{value:g}"))
        ax.grid(axis="x", visible=True)
        ax.grid(axis="y", visible=False)
        ax.set_xlabel(f"delay from onset to first raise [minutes; {low:g} or less drawn at {low:g}]")
        ax.set_title("Detection delay per incident")
        from matplotlib.lines import Line2D

        handles = [Line2D([], [], linestyle="none", marker=marker_of(d), color=colour_of(d),
                          markersize=5.5, label=d) for d in scores.detectors]  # fmt: skip
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0))
        return to_svg(fig)


# ---------------------------------------------------------------------------------------------------
# One tag around one episode


def episode_figure(trace: TagTrace, window: tuple[int, int], intervals: Sequence[tuple[str, int, int, int]],
                   incidents: Sequence[Incident], data_end_ns: int, title: str,
                   salt: str = "episode") -> str:  # fmt: skip
    """Values, centre and limits, CUSUM and EWMA against their limits, and which alarms were raised when.

    ``intervals`` holds (detector, raise ns, clear ns or -1, direction) for the tag's alarms.
    """
    lo, hi = window
    statistic_panels = [d for d in ("cusum", "ewma") if d in trace.detectors]
    ratios = [3.2] + [1.5] * len(statistic_panels) + [0.35 + 0.22 * len(trace.detectors)]
    height = 1.1 + 1.05 * sum(ratios)
    with _figure(salt, 9.6, height) as fig:
        grid = fig.add_gridspec(len(ratios), 1, height_ratios=ratios, hspace=0.12, left=0.085, right=0.975,
                                top=1 - 0.42 / height, bottom=0.78 / height)  # fmt: skip
        axes = [fig.add_subplot(grid[0])]
        for k in range(1, len(ratios)):
            axes.append(fig.add_subplot(grid[k], sharex=axes[0]))
        values_ax, strip_ax = axes[0], axes[-1]
        x_lo, x_hi = _times([lo])[0], _times([hi])[0]

        for ax in axes:
            for incident in incidents:
                start, end = incident.window(data_end_ns)
                if end >= lo and start <= hi:
                    ax.axvspan(_times([max(start, lo)])[0], _times([min(end, hi)])[0], color=INCIDENT_FILL,
                               zorder=0, linewidth=0)  # fmt: skip
                    if lo <= start <= hi:
                        ax.axvline(_times([start])[0], color=INCIDENT_EDGE, linewidth=1.2, zorder=1)

        _values_panel(values_ax, trace, lo, hi, intervals)
        for ax, detector in zip(axes[1:-1], statistic_panels, strict=True):
            _statistic_panel(ax, trace, detector, lo, hi, intervals)
        _alarm_strip(strip_ax, trace, lo, hi, intervals)
        for ax in axes[:-1]:
            ax.tick_params(labelbottom=False)
        strip_ax.set_xlim(x_lo, x_hi)
        _time_axis(strip_ax)
        values_ax.set_title(title)
        handles, labels = _episode_legend(values_ax, trace, incidents)
        fig.legend(handles, labels, loc="lower left", bbox_to_anchor=(0.085, 0.0), ncol=4, fontsize=7.5)
        return to_svg(fig)


def _in_window(ts: np.ndarray, lo: int, hi: int) -> np.ndarray:
    return (ts >= lo) & (ts <= hi)


def _values_panel(ax: Axes, trace: TagTrace, lo: int, hi: int, intervals: Sequence[tuple[str, int, int, int]]) -> None:
    inside = _in_window(trace.ts, lo, hi)
    used = inside & (trace.reason == 0)
    excluded = inside & (trace.reason != 0)
    x, y = envelope(trace.ts[used], trace.value[used])
    ax.plot(_times(x), y, color=INK, linewidth=0.55, alpha=0.75, zorder=2)

    points = _in_window(trace.point_ts, lo, hi)
    p_ts, p_n = trace.point_ts[points], trace.point_n[points]
    p_value = trace.point_charted[points]
    grouped = bool(p_n.size and p_n.max() > 1)
    if grouped or trace.phi:
        px, py = envelope(p_ts, p_value)
        ax.plot(_times(px), py, color=colour_of("shewhart"), linewidth=1.1, zorder=3)
    ax.axhline(trace.centre, color=RULE, linewidth=0.9, zorder=1)
    if trace.shewhart_limit is not None and p_ts.size:
        if trace.phi:  # ar1 tags chart one-step residuals: the limits are on centre + residual
            half = np.full(p_ts.shape[0], trace.shewhart_limit * trace.chart_sigma)
        else:
            half = trace.shewhart_limit * trace.sigma / np.sqrt(np.maximum(p_n, 1))
        lx, ly = envelope(p_ts, half)
        for sign in (1, -1):
            ax.step(_times(lx), trace.centre + sign * ly, where="pre", color=colour_of("shewhart"),
                    linewidth=0.9, linestyle=(0, (5, 2)), zorder=2)  # fmt: skip

    finite = trace.value[used]
    ref = [trace.centre]
    if trace.shewhart_limit is not None:
        ref += [trace.centre + s * trace.shewhart_limit * trace.sigma for s in (1, -1)]
    bottom = min([*ref, float(finite.min())] if finite.size else ref)
    top = max([*ref, float(finite.max())] if finite.size else ref)
    margin = (top - bottom) * 0.08 or abs(trace.centre) * 0.05 or 1.0
    bottom, top = bottom - margin, top + margin
    if excluded.any():
        ex_ts, ex_value = trace.ts[excluded], trace.value[excluded]
        if ex_ts.shape[0] > 600:
            keep = np.linspace(0, ex_ts.shape[0] - 1, 600).astype(np.int64)
            ex_ts, ex_value = ex_ts[keep], ex_value[keep]
        on_scale = np.isfinite(ex_value) & (ex_value >= bottom) & (ex_value <= top)
        ax.plot(_times(ex_ts[on_scale]), ex_value[on_scale], linestyle="none", marker="x", markersize=4,
                color=EXCLUDED, markeredgewidth=0.8, zorder=4)  # fmt: skip
        high = ~on_scale & (np.nan_to_num(ex_value, nan=-np.inf) > top)
        low = ~on_scale & ~high
        edge = (top - bottom) * 0.03
        for mask, level, marker in ((high, top - edge, 6), (low, bottom + edge, 7)):
            if mask.any():
                ax.plot(_times(ex_ts[mask]), np.full(int(mask.sum()), level), linestyle="none", marker=marker,
                        markersize=5, color=EXCLUDED, zorder=4)  # fmt: skip
    _event_marks(ax, trace.point_ts, np.clip(trace.point_charted, bottom, top), lo, hi, intervals, None)
    ax.set_ylim(bottom, top)
    ax.yaxis.set_major_locator(_few_ticks(5))
    what = "subgroup mean and samples" if grouped else "value"
    ax.set_ylabel(_unit_label(what, trace.units))


def _statistic_panel(ax: Axes, trace: TagTrace, detector: str, lo: int, hi: int,
                     intervals: Sequence[tuple[str, int, int, int]]) -> None:  # fmt: skip
    detail = trace.detectors[detector]
    points = _in_window(trace.point_ts, lo, hi)
    ts, statistic, limit = trace.point_ts[points], detail.statistic[points], detail.limit[points]
    colour = colour_of(detector)
    x, y = envelope(ts, statistic)
    ax.plot(_times(x), y, color=colour, linewidth=0.95, zorder=3)
    lx, ly = envelope(ts, limit)
    for sign in (1, -1):
        ax.plot(_times(lx), sign * ly, color=colour, linewidth=0.9, linestyle=(0, (5, 2)), zorder=2)
    ax.axhline(0.0, color=RULE, linewidth=0.8, zorder=1)
    _event_marks(ax, ts, statistic, lo, hi, intervals, detector)
    bound = float(np.nanmax(np.abs(limit))) if limit.size and np.isfinite(limit).any() else 1.0
    extreme = float(np.nanmax(np.abs(statistic))) if statistic.size and np.isfinite(statistic).any() else 0.0
    span = max(bound, extreme) * 1.15
    ax.set_ylim(-span, span)
    ax.yaxis.set_major_locator(_few_ticks(3))
    ax.set_ylabel(f"{detector.upper()}\n[std. errors]", fontsize=7.5)


def _event_marks(ax: Axes, point_ts: np.ndarray, point_value: np.ndarray, lo: int, hi: int,
                 intervals: Sequence[tuple[str, int, int, int]], only: str | None) -> None:  # fmt: skip
    """Raise and clear marks at the charted points where they happened, one drawing call per kind of mark."""
    groups: dict[tuple[str, str], list[tuple[int, float]]] = {}
    for detector, start, end, direction in intervals:
        if only is not None and detector != only:
            continue
        for moment, kind in ((start, "raise"), (end, "clear")):
            if moment < 0 or not (lo <= moment <= hi):
                continue
            j = int(np.searchsorted(point_ts, moment))
            if j >= point_ts.shape[0] or point_ts[j] != moment:
                continue
            marker = (RAISE_UP if direction >= 0 else RAISE_DOWN) if kind == "raise" else CLEAR_MARK
            groups.setdefault((detector, marker), []).append((moment, float(point_value[j])))
    for (detector, marker), marks in groups.items():
        colour = colour_of(detector)
        x = _times([m[0] for m in marks])
        ax.plot(x, [m[1] for m in marks], linestyle="none", marker=marker, markersize=6.5,
                markerfacecolor="white" if marker == CLEAR_MARK else colour, markeredgecolor=colour,
                markeredgewidth=1.1, zorder=6)  # fmt: skip


def _alarm_strip(ax: Axes, trace: TagTrace, lo: int, hi: int, intervals: Sequence[tuple[str, int, int, int]]) -> None:
    names = list(trace.detectors)
    for row, detector in enumerate(names):
        colour = colour_of(detector)
        xs: list[Any] = []
        ys: list[float] = []
        starts = []
        for name, start, end, _direction in intervals:
            if name != detector:
                continue
            stop = end if end >= 0 else hi
            if stop < lo or start > hi:
                continue
            a, b = _times([max(start, lo), min(stop, hi)])
            xs += [a, b, np.datetime64("NaT")]
            ys += [row, row, np.nan]
            if start >= lo:
                starts.append(a)
        if xs:
            ax.plot(xs, ys, color=colour, linewidth=5.5, solid_capstyle="butt", alpha=0.85)
        if starts:
            ax.plot(starts, [row] * len(starts), linestyle="none", marker="|", markersize=8, color=INK,
                    markeredgewidth=1.2, zorder=4)  # fmt: skip
    ax.set_yticks(range(len(names)), names)
    ax.set_ylim(-0.7, len(names) - 0.3)
    ax.invert_yaxis()
    ax.grid(axis="y", visible=False)
    ax.grid(axis="x", visible=True)
    ax.tick_params(axis="y", labelsize=7.5)
    ax.set_ylabel("in alarm", fontsize=7.5)


def _episode_legend(ax: Axes, trace: TagTrace, incidents: Sequence[Incident]) -> tuple[list[Any], list[str]]:
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    handles: list[Any] = [Line2D([], [], color=INK, linewidth=0.8, alpha=0.8)]
    labels = ["samples used"]
    if trace.phi:
        handles.append(Line2D([], [], color=colour_of("shewhart"), linewidth=1.1))
        labels.append(f"charted: centre + AR(1) residual (phi {trace.phi:.2f})")
    elif trace.point_n.size and trace.point_n.max() > 1:
        handles.append(Line2D([], [], color=colour_of("shewhart"), linewidth=1.1))
        labels.append("subgroup mean")
    handles.append(Line2D([], [], color=RULE, linewidth=0.9))
    labels.append("centre line")
    if trace.shewhart_limit is not None:
        handles.append(Line2D([], [], color=colour_of("shewhart"), linewidth=0.9, linestyle=(0, (5, 2))))
        labels.append(f"limits (±{trace.shewhart_limit:g} std. errors) / decision limits")
    handles.append(Line2D([], [], color=EXCLUDED, marker="x", linestyle="none", markersize=5))
    labels.append("sample excluded by the gate (▲▼ off scale)")
    handles.append(Line2D([], [], color=INK, marker=RAISE_UP, linestyle="none", markersize=6))
    labels.append("raise (▲ up, ▼ down)")
    handles.append(Line2D([], [], color=INK, marker=CLEAR_MARK, markerfacecolor="white", linestyle="none",
                          markersize=6))  # fmt: skip
    labels.append("clear")
    if incidents:
        handles.append(Patch(facecolor=INCIDENT_FILL, edgecolor=INCIDENT_EDGE))
        labels.append("known incident (line: onset)")
    return handles, labels


# ---------------------------------------------------------------------------------------------------
# Settings side by side

# One style per setting being weighed: colour, marker and dash all differ, so the first two settings
# stay apart in grey print and for every form of colour blindness.
CONTENDER_STYLES = (
    ("#173f6b", "o", "-"),
    ("#b04a1c", "s", (0, (5, 2))),
    ("#2b8a8a", "D", (0, (1, 1.5))),
    ("#d6a019", "P", (0, (6, 2, 1, 2))),
)


def _contender_style(k: int) -> tuple[str, str, Any]:
    return CONTENDER_STYLES[k % len(CONTENDER_STYLES)]


def rate_comparison_figure(series: Sequence[tuple[str, int, np.ndarray]], flood_above: int, salt: str = "rates") -> str:
    """Alarms per 10-minute window for each setting, overlaid; thinned to each display bucket's highest."""
    with _figure(salt, 9.6, 3.0) as fig:
        ax = fig.add_axes((0.07, 0.22, 0.9, 0.64))
        highest = 0.0
        for k, (label, window_start, counts) in enumerate(series):
            colour, _marker, dash = _contender_style(k)
            starts = window_start + np.arange(counts.shape[0], dtype=np.int64) * (10 * 60 * 10**9)
            values = counts.astype(np.float64)
            if values.shape[0] > 2 * DISPLAY_BUCKETS:
                size = -(-values.shape[0] // DISPLAY_BUCKETS)
                pad = size * DISPLAY_BUCKETS - values.shape[0]
                values = np.concatenate([values, np.zeros(pad)]).reshape(DISPLAY_BUCKETS, size).max(axis=1)
                starts = starts[::size][: values.shape[0]]
                values = values[: starts.shape[0]]
            highest = max(highest, float(values.max()) if values.size else 0.0)
            ax.step(_times(starts), values, where="post", color=colour, linestyle=dash, linewidth=1.1, label=label)
        ax.axhline(flood_above, color=RULE, linestyle=(0, (6, 3)), linewidth=1.0,
                   label=f"flood: more than {flood_above}")  # fmt: skip
        ax.set_ylim(0, max(highest, flood_above) * 1.12 + 0.5)
        ax.set_ylabel("alarms per 10 min")
        ax.set_title("Alarms per 10-minute window, each setting")
        _time_axis(ax)
        ax.legend(loc="upper left", bbox_to_anchor=(0.0, -0.16), ncol=len(series) + 1)
        return to_svg(fig)


def tag_comparison_figure(tags: Sequence[str], labels: Sequence[str], raises: np.ndarray, salt: str = "tags") -> str:
    """Raises per tag (rows) for each setting (bars side by side); ``raises`` is tags x settings."""
    n_tags, n_settings = raises.shape
    height = 1.0 + 0.22 * n_tags * max(n_settings, 2) / 2
    with _figure(salt, 9.6, height) as fig:
        ax = fig.add_axes((0.16, 0.65 / height, 0.76, 1 - 1.1 / height))
        bar = 0.8 / n_settings
        rows = np.arange(n_tags)[::-1]
        for k, label in enumerate(labels):
            colour, _marker, _dash = _contender_style(k)
            hatch = ("", "///", "\\\\\\", "++")[k % 4]
            ax.barh(rows + 0.4 - bar * (k + 0.5), raises[:, k], height=bar * 0.92, color=colour, hatch=hatch,
                    edgecolor="white", linewidth=0.5, label=label)  # fmt: skip
        ax.set_yticks(rows, list(tags))
        ax.grid(axis="y", visible=False)
        ax.grid(axis="x", visible=True)
        ax.set_xlabel("raises")
        ax.set_title("Raises per tag, each setting")
        ax.legend(loc="lower right")
        return to_svg(fig)


def delay_comparison_figure(incidents: Sequence[str], labels: Sequence[str], delays: Sequence[Sequence[float | None]],
                            salt: str = "delays") -> str | None:  # fmt: skip
    """Delay to first raise per incident (rows) and setting (marker); None is a miss, drawn at the right."""
    found = [d / 60e9 for row in delays for d in row if d is not None and d > 0]
    if not incidents:
        return None
    low = float(min(10 ** np.floor(np.log10(min(found) / 1.5)), 0.5)) if found else 0.1
    high = max(max(found) * 2 if found else 10.0, 10.0)
    missed_x = high * 2.6
    height = 1.1 + 0.38 * len(incidents)
    with _figure(salt, 9.6, height) as fig:
        from matplotlib.ticker import FuncFormatter

        ax = fig.add_axes((0.22, 0.75 / height, 0.6, 1 - 1.15 / height))
        ax.set_xscale("log")
        offsets = np.linspace(-0.22, 0.22, len(labels))
        for k, label in enumerate(labels):
            colour, marker, _dash = _contender_style(k)
            hit_x, hit_y, miss_y = [], [], []
            for y, row in enumerate(reversed(delays)):
                if row[k] is None:
                    miss_y.append(y + offsets[k])
                else:
                    hit_x.append(max(float(row[k] or 0.0) / 60e9, low))
                    hit_y.append(y + offsets[k])
            if hit_x:
                ax.hlines(hit_y, low, hit_x, color=colour, linewidth=0.8, alpha=0.6)
                ax.plot(hit_x, hit_y, linestyle="none", marker=marker, markersize=5.5, color=colour, label=label,
                        zorder=3)  # fmt: skip
            if miss_y:
                ax.plot([missed_x] * len(miss_y), miss_y, linestyle="none", marker=marker, markersize=5,
                        markerfacecolor="white", markeredgecolor=colour, zorder=3,
                        label=None if hit_x else label)  # fmt: skip
        ax.axvline(high * 1.5, color=RULE, linewidth=0.7)
        ax.text(missed_x, len(incidents) - 0.35, "missed", ha="center", fontsize=7.5, color=INK)
        ax.set_yticks(range(len(incidents)), list(reversed(incidents)))
        ax.set_ylim(-0.6, len(incidents) - 0.2)
        ax.set_xlim(low / 1.6, high * 4.5)
        ax.xaxis.set_major_formatter(FuncFormatter(lambda value, _position: f"{value:g}"))
        ax.grid(axis="x", visible=True)
        ax.grid(axis="y", visible=False)
        ax.set_xlabel("delay from onset to first raise of any detector [minutes]")
        ax.set_title("Detection delay per incident, each setting")
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0))
        return to_svg(fig)
