"""Absorbing Markov chains: the arithmetic shared by every run-length calculation in this package.

A chart's statistic is discretised (or, for run rules, its history is encoded) into transient states;
a signal is the absorbing state. Everything then follows from the transient block Q and the
distribution of the state after the first point:

- expected run length from each state, L = (I - Q)^-1 1 (Brook & Evans 1972);
- the second moment from each state, M2 = 2 (I - Q)^-1 L - L;
- the survival function P(N > t) by stepping the distribution forward, with a geometric tail once
  the surviving mass has settled on the quasi-stationary distribution;
- the quasi-stationary distribution itself (conditional steady state), by inverse iteration.

The first point is handled separately from the grid ("first step" row) so that a start value that is
not a grid centre, such as a CUSUM headstart, costs no discretisation error of its own.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import TypeAlias

import numpy as np
import scipy.linalg as dense_linalg
import scipy.sparse as sparse
import scipy.sparse.linalg as sparse_linalg

Matrix: TypeAlias = np.ndarray | sparse.csr_matrix

# Stepping the survival function stops once the surviving distribution is this close (L1) to the
# quasi-stationary one; from there on each point removes the same fraction of the mass.
_SETTLED = 1e-9
_MAX_STEPS = 200_000
# Larger dense blocks go to the sparse (single-threaded) LU: a threaded BLAS on a busy two-core machine
# was measured 100x slower than one thread for a 161 x 161 LU. Entries below 1e-18 are dropped; they
# move an ARL by at most ARL * states * 1e-18.
_DENSE_LIMIT = 128
_NEGLIGIBLE = 1e-18
# When no state loses more than this per point, the ARL (> 1e14) is beyond what double precision can
# resolve from 1 - (1 - p); it is reported as infinite.
_NEVER = 1e-14


@dataclass(frozen=True)
class Survival:
    """P(N > t) for t = 0..len(head)-1, continued geometrically by ``tail_ratio`` beyond."""

    head: np.ndarray
    tail_ratio: float

    def quantile(self, q: float) -> int:
        """Smallest t with P(N <= t) >= q: the run length a fraction q of runs does not exceed."""
        target = 1.0 - q
        hits = np.nonzero(self.head <= target + 1e-12)[0]
        if hits.size:
            return int(max(hits[0], 1))
        last = self.head.shape[0] - 1
        if not 0.0 < self.tail_ratio < 1.0:
            raise ArithmeticError("the run-length distribution has no geometric tail to extend")
        steps = np.log(target / self.head[last]) / np.log(self.tail_ratio)
        return int(last + max(1, int(np.ceil(steps - 1e-9))))

    def extended(self, length: int) -> np.ndarray:
        last = self.head.shape[0] - 1
        if length <= last + 1:
            return self.head[:length]
        extra = self.head[last] * self.tail_ratio ** np.arange(1, length - last)
        return np.concatenate([self.head, extra])


def read_quantiles(survival: Survival, quantiles: tuple[float, ...]) -> dict[float, int]:
    """Quantiles of a survival function; none when the run practically never ends."""
    try:
        return {q: survival.quantile(q) for q in quantiles}
    except ArithmeticError:
        return {}


def extrapolate(coarse: float, fine: float) -> float:
    """Richardson step for an error that falls as 1/states^2: fine + (fine - coarse) / 3."""
    if not (math.isfinite(coarse) and math.isfinite(fine)):
        return float(fine)
    return float(fine + (fine - coarse) / 3.0)


def extrapolate_survival(coarse: Survival, fine: Survival) -> Survival:
    """Pointwise Richardson step on two survival functions from chains of m and 2m states."""
    length = max(coarse.head.shape[0], fine.head.shape[0])
    head = fine.extended(length) + (fine.extended(length) - coarse.extended(length)) / 3.0
    head = np.minimum.accumulate(np.clip(head, 0.0, 1.0))
    ratio = min(max(extrapolate(coarse.tail_ratio, fine.tail_ratio), 0.0), 1.0)
    return Survival(head, ratio)


@dataclass(frozen=True)
class Converged:
    """A Richardson-extrapolated value, its estimated relative error and the finest state count used."""

    value: float
    relative_error: float
    states: int


def converge(evaluate: Callable[[int], float], base: int, tolerance: float, max_states: int) -> Converged:
    """Refine a chain until two successive Richardson values agree to ``tolerance``.

    Levels m, 2m, 4m give two extrapolations; their difference bounds the error of the coarser
    one, so it is a conservative estimate for the finer one that is returned. When ``max_states``
    stops the refinement first, the value is returned with the error actually reached.
    """
    levels = [base, 2 * base, 4 * base]
    values = [evaluate(m) for m in levels]
    while True:
        coarse = extrapolate(values[-3], values[-2])
        fine = extrapolate(values[-2], values[-1])
        if math.isinf(fine):
            return Converged(fine, 0.0, levels[-1])
        error = abs(fine - coarse) / max(abs(fine), 1e-300)
        if error <= tolerance or 2 * levels[-1] > max_states:
            return Converged(fine, error, levels[-1])
        levels.append(2 * levels[-1])
        values.append(evaluate(levels[-1]))


class AbsorbingChain:
    """Transient block ``transient`` (Q) and the sub-probability row ``first_step`` after point one.

    The run length N counts points up to and including the signalling one. The mass missing from
    ``first_step`` is the probability of a signal on the first point.
    """

    def __init__(self, transient: Matrix, first_step: np.ndarray, banded: bool = False) -> None:
        if isinstance(transient, np.ndarray) and transient.shape[0] > _DENSE_LIMIT:
            transient = sparse.csr_matrix(np.where(transient > _NEGLIGIBLE, transient, 0.0))
        self.transient = transient
        self.first_step = np.asarray(first_step, dtype=np.float64)
        # A one-dimensional statistic moves a few cells per point: its matrix is a band (plus, for the
        # CUSUM, the column of the zero cell), and LU in the natural order keeps the fill inside it.
        self.banded = banded
        self._solve: Callable[[np.ndarray, bool], np.ndarray] | None = None
        self._remaining: np.ndarray | None = None
        self._quasi_stationary: tuple[np.ndarray, float] | None = None
        self._transposed: sparse.csr_matrix | None = None

    @property
    def size(self) -> int:
        return int(self.first_step.shape[0])

    def solve(self, rhs: np.ndarray, transposed: bool = False) -> np.ndarray:
        """x with (I - Q) x = rhs (or its transpose); the factorisation is kept for later calls."""
        if self._solve is None:
            self._solve = _factorise(self.transient, self.banded)
        return self._solve(rhs, transposed)

    def advance(self, vector: np.ndarray) -> np.ndarray:
        """The sub-distribution one point later: vector . Q."""
        if isinstance(self.transient, np.ndarray):
            return np.asarray(vector @ self.transient)
        if self._transposed is None:
            self._transposed = self.transient.T.tocsr()
        return np.asarray(self._transposed @ vector)

    def remaining(self) -> np.ndarray:
        """Expected number of further points until the signal, from each transient state."""
        if self._remaining is None:
            self._remaining = self.solve(np.ones(self.size))
        return self._remaining

    @property
    def never_signals(self) -> bool:
        exit_probability = 1.0 - np.asarray(self.transient.sum(axis=1)).ravel()
        return bool(exit_probability.max() < _NEVER and 1.0 - self.first_step.sum() < _NEVER)

    def arl(self) -> float:
        if self.never_signals:
            return math.inf
        return float(1.0 + self.first_step @ self.remaining())

    def sdrl(self) -> float:
        """Standard deviation of N from E[N^2] = 1 + 2 r.L + r.M2, with M2 = 2 (I-Q)^-1 L - L."""
        if self.never_signals:
            return math.inf
        remaining = self.remaining()
        second_from_state = 2.0 * self.solve(remaining) - remaining
        second = 1.0 + 2.0 * self.first_step @ remaining + self.first_step @ second_from_state
        mean = 1.0 + self.first_step @ remaining
        return float(np.sqrt(max(second - mean * mean, 0.0)))

    def quasi_stationary(self) -> tuple[np.ndarray, float]:
        """Left Perron vector of Q (normalised to sum 1) and its eigenvalue rho.

        Inverse iteration on (I - Q)^T converges at the rate (1 - rho)/(1 - rho_2), i.e. in a few
        steps, because rho is the eigenvalue closest to 1 by a wide margin.
        """
        if self._quasi_stationary is not None:
            return self._quasi_stationary
        vector = np.full(self.size, 1.0 / self.size)
        for _ in range(200 if not self.never_signals else 20_000):
            if self.never_signals:
                # (I - Q) is singular to working precision: plain power iteration instead.
                updated = np.abs(self.advance(vector))
            else:
                updated = np.abs(self.solve(vector, transposed=True))
            updated /= updated.sum()
            if np.abs(updated - vector).sum() < 1e-13:
                vector = updated
                break
            vector = updated
        self._quasi_stationary = (vector, float(np.sum(self.advance(vector))))
        return self._quasi_stationary

    def steady_state_arl(self, in_control: AbsorbingChain) -> float:
        """ARL from the quasi-stationary distribution of ``in_control`` (same states) under this chain.

        Conditional steady state: the shift happens after the chart has run in control long enough,
        without a false alarm, for its statistic to have settled.
        """
        if self.never_signals:
            return math.inf
        distribution, _ = in_control.quasi_stationary()
        return float(distribution @ self.remaining())

    def survival(self, lowest_mass: float = 0.05) -> Survival:
        """P(N > t) stepped forward until it is below ``lowest_mass`` (1 - the highest quantile wanted)
        or the surviving distribution has settled, after which the tail is geometric."""
        if self.never_signals:
            return Survival(np.ones(1), 1.0)
        settled, ratio = self.quasi_stationary()
        values = [1.0]
        vector = self.first_step.copy()
        for _ in range(_MAX_STEPS):
            mass = float(vector.sum())
            values.append(mass)
            if mass <= lowest_mass * 0.5 or mass <= 0.0:
                break
            if np.abs(vector / mass - settled).sum() < _SETTLED:
                break
            vector = self.advance(vector)
        return Survival(np.asarray(values), ratio)


def _factorise(matrix: Matrix, banded: bool) -> Callable[[np.ndarray, bool], np.ndarray]:
    if isinstance(matrix, np.ndarray):
        factors = dense_linalg.lu_factor(np.eye(matrix.shape[0]) - matrix, check_finite=False)

        def dense_solve(rhs: np.ndarray, transposed: bool) -> np.ndarray:
            return np.asarray(dense_linalg.lu_solve(factors, rhs, trans=1 if transposed else 0, check_finite=False))

        return dense_solve
    identity = sparse.identity(matrix.shape[0], format="csc")
    factors_sparse = sparse_linalg.splu((identity - matrix).tocsc(), permc_spec="NATURAL" if banded else "COLAMD")

    def sparse_solve(rhs: np.ndarray, transposed: bool) -> np.ndarray:
        return np.asarray(factors_sparse.solve(rhs, trans="T" if transposed else "N"))

    return sparse_solve
