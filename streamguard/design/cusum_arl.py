"""Run lengths of the tabular CUSUM, with the semantics of ``detectors/cusum.py``.

    upper = max(0, upper + z - k)    lower = max(0, lower - z - k)    signal when a side exceeds h

Both sides start at headstart * h; z ~ N(mean, 1) where mean is the shift in standard errors.

One side is a Markov chain on a grid of the decision interval (Brook & Evans, Biometrika 59, 1972):
m cells of width w = 2h/(2m-1), cell 0 holding the atom at zero. The error falls as 1/m^2, so three
grids m, 2m, 4m and Richardson extrapolation reach 0.1 % with a few hundred states at most.

Two sides. With k >= 0 and start values a, b with a + b <= h + 2k, the side that does not signal
is exactly zero when the other one signals (write both sides as maxima of partial sums: a positive
upper side at the lower side's first crossing would have forced an earlier crossing of one of them).
Restarting the one-sided schemes at that moment is then a renewal, and

    ARL = (U_s L_0 + L_s U_0 - U_0 L_0) / (U_0 + L_0)

with U, L the one-sided ARLs from 0 and from the start s; for s = 0 this is 1/ARL = 1/U_0 + 1/L_0.
(For headstarts an identity of this form goes back to Lucas & Crosier, Technometrics 24, 1982 — from
memory.) The argument above makes it exact whenever headstart * h <= h/2 + k, which covers the usual
headstart h/2. Beyond that, and for what the identity cannot give (run-length quantiles, SDRL, steady
state), the joint two-dimensional chain on (upper, lower) is used, with m^2 states.

Siegmund's corrected diffusion approximation is kept as an independent check.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.sparse as sparse
from scipy.special import ndtr

from .markov import AbsorbingChain, Converged, converge, extrapolate, extrapolate_survival, read_quantiles
from .results import DEFAULT_QUANTILES, RunLength

# Grid width at the coarsest level, in units of the point's standard deviation.
_COARSE_WIDTH = 0.25
_MIN_STATES = 16
_MAX_STATES = 3200
# The two-dimensional chain has m^2 states; keep it to what solves in well under a second.
_MAX_SIDE_2D = 96
_EXTRAS_SIDE_2D = 64

SIDES = ("two", "upper", "lower")


def _coarse_states(h: float) -> int:
    # Three levels (m, 2m, 4m) must fit under the cap; a very long h then gets a coarser start.
    return min(max(_MIN_STATES, math.ceil(h / _COARSE_WIDTH)), _MAX_STATES // 4)


def _one_sided_rows(values: np.ndarray, k: float, h: float, mean: float, states: int) -> np.ndarray:
    """Probabilities of moving from each value in ``values`` to each cell (rows), signal excluded."""
    width = 2.0 * h / (2 * states - 1)
    upper_edges = (np.arange(states) + 0.5) * width
    below_edge = ndtr(upper_edges[None, :] - values[:, None] + k - mean)
    rows = np.empty_like(below_edge)
    rows[:, 0] = below_edge[:, 0]
    rows[:, 1:] = np.diff(below_edge, axis=1)
    return rows


def one_sided_chain(k: float, h: float, mean: float, states: int, start: float = 0.0) -> AbsorbingChain:
    """Brook & Evans chain of the upper side; the lower side is this chain with -mean."""
    width = 2.0 * h / (2 * states - 1)
    centres = np.arange(states) * width
    transient = _one_sided_rows(centres, k, h, mean, states)
    first_step = _one_sided_rows(np.array([start]), k, h, mean, states)[0]
    return AbsorbingChain(transient, first_step, banded=True)


def _two_sided_rows(upper: np.ndarray, lower: np.ndarray, k: float, h: float, mean: float,
                    states: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:  # fmt: skip
    """Transitions from states (upper, lower) as (source, destination, probability) triples.

    As z grows the upper side moves up and the lower side down, so each source has at most 2m
    breakpoints in z; between two of them the destination cell pair is constant.
    """
    width = 2.0 * h / (2 * states - 1)
    edges = (np.arange(states) + 0.5) * width
    count = upper.shape[0]
    breaks = np.concatenate(
        [edges[None, :] - upper[:, None] + k, lower[:, None] - k - edges[None, :]], axis=1
    )
    breaks.sort(axis=1)
    low = np.concatenate([np.full((count, 1), -np.inf), breaks], axis=1)
    high = np.concatenate([breaks, np.full((count, 1), np.inf)], axis=1)
    inside = np.where(np.isinf(low), high - 1.0, np.where(np.isinf(high), low + 1.0, 0.5 * (low + high)))
    probability = ndtr(high - mean) - ndtr(low - mean)
    upper_cell = np.searchsorted(edges, upper[:, None] + inside - k, side="right")
    lower_cell = np.searchsorted(edges, lower[:, None] - inside - k, side="right")
    keep = (upper_cell < states) & (lower_cell < states) & (probability > 0.0)
    source = np.broadcast_to(np.arange(count)[:, None], keep.shape)[keep]
    destination = (upper_cell * states + lower_cell)[keep]
    return source, destination, probability[keep]


def two_sided_chain(k: float, h: float, mean: float, states: int, start: float = 0.0) -> AbsorbingChain:
    """The joint two-dimensional chain on (upper, lower): m^2 states, no assumption about the sides."""
    width = 2.0 * h / (2 * states - 1)
    grid = np.arange(states) * width
    upper = np.repeat(grid, states)
    lower = np.tile(grid, states)
    size = states * states
    source, destination, probability = _two_sided_rows(upper, lower, k, h, mean, states)
    transient = sparse.csr_matrix((probability, (source, destination)), shape=(size, size))
    _, first_destination, first_probability = _two_sided_rows(
        np.array([start]), np.array([start]), k, h, mean, states
    )
    first_step = np.bincount(first_destination, weights=first_probability, minlength=size)
    return AbsorbingChain(transient, first_step)


def combination_is_exact(k: float, h: float, start: float) -> bool:
    """Whether the one-sided ARLs combine exactly (see the module docstring)."""
    return k >= 0.0 and 2.0 * start <= h + 2.0 * k + 1e-12


def combine_sides(upper_zero: float, upper_start: float, lower_zero: float, lower_start: float) -> float:
    """Two-sided ARL from one-sided ARLs started at 0 and at the headstart."""
    if math.isinf(upper_zero) or math.isinf(lower_zero):
        # A side that practically never signals leaves the other one to end the run alone.
        return math.inf if math.isinf(upper_zero) and math.isinf(lower_zero) else (
            lower_start if math.isinf(upper_zero) else upper_start
        )
    numerator = upper_start * lower_zero + lower_start * upper_zero - upper_zero * lower_zero
    return float(numerator / (upper_zero + lower_zero))


def _combined_at(k: float, h: float, mean: float, start: float, states: int) -> float:
    upper = one_sided_chain(k, h, mean, states)
    lower = upper if mean == 0.0 else one_sided_chain(k, h, -mean, states)
    upper_zero, lower_zero = upper.arl(), lower.arl()
    if start == 0.0:
        return combine_sides(upper_zero, upper_zero, lower_zero, lower_zero)
    upper_start = _arl_from(start, upper, k, h, mean, states)
    lower_start = _arl_from(start, lower, k, h, -mean, states)
    return combine_sides(upper_zero, upper_start, lower_zero, lower_start)


def _arl_from(start: float, chain: AbsorbingChain, k: float, h: float, mean: float, states: int) -> float:
    """One-sided ARL from an arbitrary start value, through the chain's expected remaining run lengths."""
    if chain.never_signals:
        return math.inf
    return 1.0 + float(_one_sided_rows(np.array([start]), k, h, mean, states)[0] @ chain.remaining())


def cusum_arl(k: float, h: float, headstart: float, mean: float, side: str = "two",
              tolerance: float = 1e-3) -> tuple[Converged, str]:  # fmt: skip
    """Zero-state ARL (from the headstart) and the name of the method that produced it."""
    start = headstart * h
    base = _coarse_states(h)
    if side != "two":
        signed = mean if side == "upper" else -mean
        result = converge(lambda m: one_sided_chain(k, h, signed, m, start).arl(), base, tolerance, _MAX_STATES)
        return result, "Markov chain (Brook & Evans 1972), Richardson-extrapolated"
    if combination_is_exact(k, h, start):
        result = converge(lambda m: _combined_at(k, h, mean, start, m), base, tolerance, _MAX_STATES)
        return result, "one-sided Markov chains (Brook & Evans 1972) combined exactly, Richardson-extrapolated"
    base_2d = min(max(8, math.ceil(h / 0.5)), _MAX_SIDE_2D // 4)
    result = converge(lambda m: two_sided_chain(k, h, mean, m, start).arl(), base_2d, tolerance, _MAX_SIDE_2D)
    return result, "two-dimensional Markov chain on (upper, lower), Richardson-extrapolated"


def quick_cusum_arl(k: float, h: float, mean: float) -> float:
    """Two-sided zero-start ARL from two grids and one Richardson step, no convergence check (searches)."""
    base = _coarse_states(h)
    return extrapolate(_combined_at(k, h, mean, 0.0, base), _combined_at(k, h, mean, 0.0, 2 * base))


def siegmund_arl(k: float, h: float, mean: float, side: str = "two") -> float:
    """Siegmund's (1985) corrected diffusion approximation, h replaced by h + 1.166."""

    def one_side(drift: float) -> float:
        b = h + 1.166
        if abs(drift) < 1e-9:
            return b * b
        exponent = -2.0 * drift * b
        if exponent > 700.0:  # beyond double precision: the side practically never signals
            return math.inf
        return (math.exp(exponent) + 2.0 * drift * b - 1.0) / (2.0 * drift * drift)

    if side == "upper":
        return one_side(mean - k)
    if side == "lower":
        return one_side(-mean - k)
    return 1.0 / (1.0 / one_side(mean - k) + 1.0 / one_side(-mean - k))


def cusum_run_length(k: float, h: float, headstart: float, shift: float, chart_shift: float,
                     side: str = "two", tolerance: float = 1e-3,
                     quantiles: tuple[float, ...] = DEFAULT_QUANTILES,
                     steady_state: bool = True) -> RunLength:  # fmt: skip
    """ARL to ``tolerance``, plus SDRL, quantiles and steady-state ARL where the chain is cheap."""
    converged, method = cusum_arl(k, h, headstart, chart_shift, side, tolerance)
    start = headstart * h
    notes: list[str] = []
    levels: tuple[int, int] | None
    if side == "two":
        side_2d = max(8, math.ceil(h / 0.5))
        levels = (side_2d, 2 * side_2d) if 2 * side_2d <= _EXTRAS_SIDE_2D else None

        def build(mean: float, m: int) -> AbsorbingChain:
            return two_sided_chain(k, h, mean, m, start)

        if levels is None:
            notes.append(f"SDRL, quantiles and steady state skipped: h = {h:g} needs a two-dimensional chain "
                         f"of more than {_EXTRAS_SIDE_2D}^2 states")  # fmt: skip
    else:
        base = _coarse_states(h)
        levels = (2 * base, 4 * base)
        sign = 1.0 if side == "upper" else -1.0

        def build(mean: float, m: int) -> AbsorbingChain:
            return one_sided_chain(k, h, sign * mean, m, start)

    sdrl = None
    quantile_values: dict[float, int] = {}
    steady = None
    if levels is not None:
        coarse, fine = build(chart_shift, levels[0]), build(chart_shift, levels[1])
        sdrl = extrapolate(coarse.sdrl(), fine.sdrl())
        if quantiles:
            lowest = 1.0 - max(quantiles)
            survival = extrapolate_survival(coarse.survival(lowest), fine.survival(lowest))
            quantile_values = read_quantiles(survival, quantiles)
        if steady_state:
            coarse_ic = coarse if chart_shift == 0.0 else build(0.0, levels[0])
            fine_ic = fine if chart_shift == 0.0 else build(0.0, levels[1])
            steady = extrapolate(coarse.steady_state_arl(coarse_ic), fine.steady_state_arl(fine_ic))
    return RunLength(
        detector="cusum",
        shift=shift,
        chart_shift=chart_shift,
        arl=converged.value,
        tolerance=converged.relative_error,
        method=method,
        sdrl=sdrl,
        quantiles=quantile_values,
        steady_state_arl=steady,
        notes=tuple(notes),
    )
