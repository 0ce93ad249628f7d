"""Run lengths of the EWMA chart, with the semantics of ``detectors/ewma.py``.

    e_i = lambda z_i + (1 - lambda) e_{i-1},  e_0 = 0,   signal when |e_i| > L sigma_i

with sigma_i = sqrt(lambda/(2-lambda) (1 - (1-lambda)^(2i))) for exact limits, or its limit for
asymptotic ones; z ~ N(mean, 1).

Asymptotic limits: the Markov chain of Lucas & Saccucci (Technometrics 32, 1990) on 2m+1 cells
across (-H, H), H = L sqrt(lambda/(2-lambda)); error ~ 1/m^2, removed by Richardson extrapolation.
The cell width is tied to lambda, the width of one step's noise in e, not to H.

Exact limits: the same grid, stepped point by point with each point's own limit (a time-inhomogeneous
chain). Mass that lands beyond the limit of its point is a signal. Once the limit is within a
negligible sliver of the asymptotic one, the homogeneous chain's expected remaining run lengths
finish the sum:  ARL = 1 + sum_{t=1}^{T-1} P(N > t) + p_T . L_inf.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sparse
from scipy.special import ndtr

from .markov import (
    AbsorbingChain,
    Converged,
    Survival,
    converge,
    extrapolate,
    extrapolate_survival,
    read_quantiles,
)
from .results import DEFAULT_QUANTILES, RunLength

# Cells per unit of lambda at the coarsest level (each point moves e by lambda * z).
_CELLS_PER_LAMBDA = 4.0
_MIN_HALF_CELLS = 10
_MAX_HALF_CELLS = 1600
LIMIT_KINDS = ("exact", "asymptotic")
# Up to this many cells the dense matrix is cheap to build; larger ones are built as bands directly.
_DENSE_CELLS = 129


@dataclass(frozen=True)
class _Grid:
    centres: np.ndarray
    edges: np.ndarray  # cell boundaries, len(centres) + 1
    half_width: float  # H, the asymptotic limit


def _grid(lam: float, L: float, half_cells: int) -> _Grid:
    half_width = L * math.sqrt(lam / (2.0 - lam))
    count = 2 * half_cells + 1
    edges = np.linspace(-half_width, half_width, count + 1)
    return _Grid(0.5 * (edges[:-1] + edges[1:]), edges, half_width)


def _coarse_half_cells(lam: float, L: float) -> int:
    half_width = L * math.sqrt(lam / (2.0 - lam))
    return max(_MIN_HALF_CELLS, math.ceil(_CELLS_PER_LAMBDA * half_width / lam))


def _edge_probabilities(start: np.ndarray, edges: np.ndarray, lam: float, mean: float) -> np.ndarray:
    """P(e_next <= edge) from each previous value in ``start``: rows = start values, columns = edges."""
    return ndtr((edges[None, :] - (1.0 - lam) * start[:, None]) / lam - mean)


def _banded_rows(start: np.ndarray, grid: _Grid, lam: float, mean: float) -> sparse.csr_matrix:
    """Transition rows from each value in ``start``; only cells within 9.5 sd of the step are kept.

    One point moves e by lambda * z, a few cells of width ~lambda/4; beyond 9.5 sd the normal mass
    (1e-21) is far below anything an ARL can feel, so the matrix is banded and the LU cheap.
    """
    cells = grid.centres.shape[0]
    width = grid.edges[1] - grid.edges[0]
    reach = 9.5 * lam
    band = min(cells, int(math.ceil(2.0 * reach / width)) + 2)
    centre = (1.0 - lam) * start + lam * mean
    first = np.clip(np.searchsorted(grid.edges, centre - reach) - 1, 0, max(cells - band, 0))
    edges = grid.edges[first[:, None] + np.arange(band + 1)[None, :]]
    below = ndtr((edges - (1.0 - lam) * start[:, None]) / lam - mean)
    columns = first[:, None] + np.arange(band)[None, :]
    rows = np.broadcast_to(np.arange(start.shape[0])[:, None], columns.shape)
    return sparse.csr_matrix((np.diff(below, axis=1).ravel(), (rows.ravel(), columns.ravel())),
                             shape=(start.shape[0], cells))  # fmt: skip


def asymptotic_chain(lam: float, L: float, mean: float, half_cells: int) -> AbsorbingChain:
    grid = _grid(lam, L, half_cells)
    transient: np.ndarray | sparse.csr_matrix
    if grid.centres.shape[0] <= _DENSE_CELLS:
        transient = np.diff(_edge_probabilities(grid.centres, grid.edges, lam, mean), axis=1)
    else:
        transient = _banded_rows(grid.centres, grid, lam, mean)
    first_step = np.diff(_edge_probabilities(np.zeros(1), grid.edges, lam, mean), axis=1)[0]
    return AbsorbingChain(transient, first_step, banded=True)


def _limit_ratio(lam: float, points: int) -> float:
    """sigma_i / sigma_inf for the i-th point after a start."""
    return math.sqrt(1.0 - (1.0 - lam) ** (2 * points))


class ExactLimitsStart:
    """The first T points with their own limits, then the homogeneous (asymptotic) chain."""

    def __init__(self, lam: float, L: float, mean: float, half_cells: int) -> None:
        grid = _grid(lam, L, half_cells)
        self.homogeneous = asymptotic_chain(lam, L, mean, half_cells)
        width = grid.edges[1] - grid.edges[0]
        # Stop once the limit is within a millionth of a cell of the asymptotic one.
        steps = 1
        while grid.half_width * (1.0 - _limit_ratio(lam, steps)) > 1e-6 * width:
            steps += 1
        self.steps = steps
        masses = [1.0]
        vector = np.zeros(grid.centres.shape[0])
        previous = np.zeros(1)
        for point in range(1, steps + 1):
            limit = grid.half_width * _limit_ratio(lam, point)
            inside = (grid.edges[:-1] >= -limit) & (grid.edges[1:] <= limit)
            cut = np.nonzero(~inside & (grid.edges[1:] > -limit) & (grid.edges[:-1] < limit))[0]
            if point == 1:
                stepped = np.diff(_edge_probabilities(previous, grid.edges, lam, mean), axis=1)[0]
                sources, weights = previous, np.ones(1)
            else:
                stepped = self.homogeneous.advance(vector)
                sources, weights = grid.centres, vector
            stepped[~inside] = 0.0
            if cut.size:
                low = np.maximum(grid.edges[cut], -limit)
                high = np.minimum(grid.edges[cut + 1], limit)
                within = _edge_probabilities(sources, high, lam, mean) - _edge_probabilities(sources, low, lam, mean)
                stepped[cut] = weights @ within
            vector = stepped
            masses.append(float(vector.sum()))
        self.head = np.asarray(masses)  # P(N > t), t = 0..T
        self.after = vector  # surviving sub-distribution after point T

    def arl(self) -> float:
        return float(self.head[:-1].sum() + self.after @ self.homogeneous.remaining())

    def sdrl(self) -> float:
        t = np.arange(self.head.shape[0] - 1)
        remaining = self.homogeneous.remaining()
        second_from_state = 2.0 * self.homogeneous.solve(remaining) - remaining
        tail = 2.0 * self.steps * (self.after @ remaining) + self.after @ second_from_state
        second = float(((2 * t + 1) * self.head[:-1]).sum() + tail)
        mean = self.arl()
        return math.sqrt(max(second - mean * mean, 0.0))

    def survival(self, lowest_mass: float) -> Survival:
        continued = AbsorbingChain(self.homogeneous.transient, self.after, banded=True)
        rest = continued.survival(lowest_mass)
        # rest.head = [1, P(N > T), P(N > T+1), ...]: its first entry stands for the start, not a point.
        return Survival(np.concatenate([self.head[:-1], rest.head[1:]]), rest.tail_ratio)


def ewma_arl(lam: float, L: float, limits: str, mean: float, tolerance: float = 1e-3) -> tuple[Converged, str]:
    base = _coarse_half_cells(lam, L)
    if limits == "asymptotic":
        result = converge(lambda m: asymptotic_chain(lam, L, mean, m).arl(), base, tolerance, _MAX_HALF_CELLS)
        return result, "Markov chain (Lucas & Saccucci 1990), Richardson-extrapolated"
    result = converge(lambda m: ExactLimitsStart(lam, L, mean, m).arl(), base, tolerance, _MAX_HALF_CELLS)
    return result, "time-inhomogeneous Markov chain (exact limits), Richardson-extrapolated"


def quick_asymptotic_arl(lam: float, L: float, mean: float) -> float:
    """Two grids and one Richardson step, no convergence check: ~1e-4 relative, for searches."""
    base = _coarse_half_cells(lam, L)
    return extrapolate(asymptotic_chain(lam, L, mean, base).arl(), asymptotic_chain(lam, L, mean, 2 * base).arl())


def ewma_run_length(lam: float, L: float, limits: str, shift: float, chart_shift: float,
                    tolerance: float = 1e-3, quantiles: tuple[float, ...] = DEFAULT_QUANTILES,
                    steady_state: bool = True) -> RunLength:  # fmt: skip
    converged, method = ewma_arl(lam, L, limits, chart_shift, tolerance)
    base = _coarse_half_cells(lam, L)
    levels = (base, 2 * base)
    sdrl = None
    quantile_values: dict[float, int] = {}
    if limits == "asymptotic":
        coarse, fine = (asymptotic_chain(lam, L, chart_shift, m) for m in levels)
        sdrl = extrapolate(coarse.sdrl(), fine.sdrl())
        if quantiles:
            lowest = 1.0 - max(quantiles)
            survival = extrapolate_survival(coarse.survival(lowest), fine.survival(lowest))
            quantile_values = read_quantiles(survival, quantiles)
        coarse_chain, fine_chain = coarse, fine
    else:
        coarse_start, fine_start = (ExactLimitsStart(lam, L, chart_shift, m) for m in levels)
        sdrl = extrapolate(coarse_start.sdrl(), fine_start.sdrl())
        if quantiles:
            lowest = 1.0 - max(quantiles)
            survival = extrapolate_survival(coarse_start.survival(lowest), fine_start.survival(lowest))
            quantile_values = read_quantiles(survival, quantiles)
        coarse_chain, fine_chain = coarse_start.homogeneous, fine_start.homogeneous
    steady = None
    if steady_state:
        # Long after a start exact limits equal the asymptotic ones, so both kinds share one steady state.
        coarse_ic = asymptotic_chain(lam, L, 0.0, levels[0])
        fine_ic = asymptotic_chain(lam, L, 0.0, levels[1])
        steady = extrapolate(coarse_chain.steady_state_arl(coarse_ic), fine_chain.steady_state_arl(fine_ic))
    return RunLength(
        detector="ewma",
        shift=shift,
        chart_shift=chart_shift,
        arl=converged.value,
        tolerance=converged.relative_error,
        method=method,
        sdrl=sdrl,
        quantiles=quantile_values,
        steady_state_arl=steady,
    )
