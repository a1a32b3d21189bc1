"""Local-hidden-variable sources: deterministic strategies, mixed or chosen with memory.

Every trial of a local source is answered by one deterministic strategy pair ``(A, B)``: Alice
outputs ``A[x]``, Bob ``B[y]``.  The strategy of a trial is fixed before its settings are looked
at, so with settings drawn afresh from ``q`` no Bell functional can exceed its local bound in
expectation -- whatever the source remembers.

``LocalMixtureSource``
    i.i.d. mixture of strategies; :meth:`LocalMixtureSource.at_bound` spreads it uniformly over
    all strategies that reach the local bound of a functional (a source sitting exactly on it).
``AdaptiveLocalSource``
    a source with memory: before each trial (or chunk of trials) it picks the strategy that
    pushes a monitor's running Bell estimate (and with it the naive sigma figure) up, from
    everything it has produced so far.

:func:`adaptive_local_counts` runs the adaptive policy for many independent runs at once
(vectorised over runs) for Monte-Carlo studies.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labwatch.bell import BellFunctional
from labwatch.scenario import Scenario
from labwatch.strategies import maximize_over_strategies, party_strategies, vertex_values
from simulators.base import PairSource, ProbabilitySource

__all__ = [
    "AdaptiveLocalSource",
    "LocalMixtureSource",
    "adaptive_local_counts",
    "optimal_strategies",
]

#: Refuse vertex tables larger than this (Monte-Carlo helper and ``at_bound`` enumerate).
_MAX_VERTICES = 1 << 16


class LocalSourceError(ValueError):
    """Bad parameters for a local source."""


def _check_rate(rate: float) -> float:
    r = float(rate)
    if not (r > 0 and np.isfinite(r)):
        raise LocalSourceError(f"rate must be a positive number of trials per second, got {rate!r}")
    return r


def _check_q(q: ArrayLike, shape: tuple[int, int]) -> NDArray[np.float64]:
    arr = np.asarray(q, dtype=np.float64)
    if arr.shape != shape or np.any(arr < 0) or abs(float(arr.sum()) - 1.0) > 1e-9:
        raise LocalSourceError(
            f"setting probabilities must be a non-negative {shape} array summing to 1, got {q!r}"
        )
    return arr / arr.sum()


def optimal_strategies(
    functional: BellFunctional, atol: float = 1e-9
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """All deterministic strategy pairs reaching the local bound of ``functional``.

    Returns
    -------
    strategies_a, strategies_b : ndarray, shapes (k, m_A), (k, m_B)
    """
    m_a, m_b, d_a, d_b = functional.coefficients.shape
    if d_a**m_a * d_b**m_b > _MAX_VERTICES * 64:
        raise LocalSourceError("too many deterministic strategies to enumerate the optimal ones")
    values = vertex_values(functional.coefficients)
    i, j = np.nonzero(values >= functional.local_bound - atol)
    return party_strategies(m_a, d_a)[i], party_strategies(m_b, d_b)[j]


class LocalMixtureSource(ProbabilitySource):
    """An i.i.d. mixture of deterministic strategy pairs.

    Parameters
    ----------
    strategies_a, strategies_b : array_like, shapes (k, m_A), (k, m_B)
        Outcome of each strategy for each setting.
    outcomes : (int, int)
        ``(d_A, d_B)``.
    weights : array_like, shape (k,), optional
        Mixture weights (uniform when omitted).
    rate : float
        Trials per second.
    """

    def __init__(
        self,
        strategies_a: ArrayLike,
        strategies_b: ArrayLike,
        outcomes: tuple[int, int],
        weights: ArrayLike | None = None,
        rate: float = 1000.0,
    ) -> None:
        sa = np.asarray(strategies_a, dtype=np.int64)
        sb = np.asarray(strategies_b, dtype=np.int64)
        if sa.ndim != 2 or sb.ndim != 2 or sa.shape[0] != sb.shape[0] or sa.shape[0] == 0:
            raise LocalSourceError(
                f"need (k, m_A) and (k, m_B) strategy arrays, got shapes {sa.shape}, {sb.shape}"
            )
        d_a, d_b = (int(v) for v in outcomes)
        self.scenario = Scenario(sa.shape[1], sb.shape[1], d_a, d_b)
        if sa.min() < 0 or sa.max() >= d_a or sb.min() < 0 or sb.max() >= d_b:
            raise LocalSourceError(f"strategy outcomes must lie in 0..{d_a - 1} / 0..{d_b - 1}")
        w = (
            np.full(sa.shape[0], 1.0 / sa.shape[0])
            if weights is None
            else np.asarray(weights, float)
        )
        if w.shape != (sa.shape[0],) or np.any(w < 0) or not w.sum() > 0:
            raise LocalSourceError(
                f"weights must be {sa.shape[0]} non-negative numbers, got {weights!r}"
            )
        self.strategies_a, self.strategies_b = sa, sb
        self.weights = w / w.sum()
        self.rate = _check_rate(rate)
        p = np.zeros(self.scenario.shape)
        xs = np.arange(sa.shape[1])[:, None]
        ys = np.arange(sb.shape[1])[None, :]
        for wk, a, b in zip(self.weights, sa, sb):
            p[xs, ys, a[:, None], b[None, :]] += wk
        self._p = p

    @classmethod
    def at_bound(cls, functional: BellFunctional, rate: float = 1000.0) -> LocalMixtureSource:
        """Uniform mixture of all strategies reaching the local bound: ``E[I] = L`` exactly."""
        sa, sb = optimal_strategies(functional)
        d_a, d_b = functional.coefficients.shape[2:]
        return cls(sa, sb, (d_a, d_b), rate=rate)

    def trial_rate(self, t: float) -> float:
        return self.rate

    def probabilities(self, t: float) -> NDArray[np.float64]:
        return self._p.copy()


class _VertexTable:
    """All deterministic strategy pairs with the functional's value per setting pair."""

    def __init__(self, functional: BellFunctional) -> None:
        m_a, m_b, d_a, d_b = functional.coefficients.shape
        n_a, n_b = d_a**m_a, d_b**m_b
        if n_a * n_b > _MAX_VERTICES:
            raise LocalSourceError(
                f"{n_a * n_b} deterministic strategies are too many for the vertex table"
            )
        sa = np.repeat(party_strategies(m_a, d_a), n_b, axis=0)  # (V, m_A)
        sb = np.tile(party_strategies(m_b, d_b), (n_a, 1))  # (V, m_B)
        self.a, self.b = sa, sb
        xs = np.arange(m_a)[None, :, None]
        ys = np.arange(m_b)[None, None, :]
        beta = functional.coefficients
        # beta[x, y, A_x, B_y] for every vertex: (V, m_A, m_B) -> (V, P)
        self.value = beta[xs, ys, sa[:, :, None], sb[:, None, :]].reshape(sa.shape[0], -1)


def _choose(
    table: _VertexTable, q_flat: NDArray[np.float64], n: NDArray[np.float64]
) -> NDArray[np.int64]:
    """Vertex index per run (leading axis) for the next trial, from the memory so far.

    The running estimate ``sum_xy sum_ab beta N / N_xy`` changes by
    ``(beta(A_x, B_y) - mean_xy) / (N_xy + 1)`` when the next trial lands on pair ``(x, y)``, so
    the expected gain is maximised by the strategy maximising ``sum_xy q beta(A_x, B_y) / (N_xy + 1)``.
    """
    weights = q_flat[None, :] / (n + 1.0)
    return np.argmax(weights @ table.value.T, axis=1)


class AdaptiveLocalSource(PairSource):
    """A local source with memory that picks each trial's strategy from its past output.

    Before each chunk of ``chunk`` trials it chooses one deterministic strategy pair using only
    the settings and outcomes it produced earlier, then answers the chunk with it; it never looks
    at a trial's settings before fixing that trial's strategy.  Its choice maximises the expected
    running Bell estimate ``sum_xy sum_ab beta N / N_xy`` after the next trial (exact over all
    strategies via :func:`labwatch.strategies.maximize_over_strategies`): it plays the "wrong"
    answer where the most trials already sit, which makes the per-setting estimate drift above
    the bound although ``E[I] <= L`` for every trial.

    Parameters
    ----------
    functional : BellFunctional
        The functional whose naive figures the source tries to push up.
    setting_probabilities : array_like, shape (m_A, m_B)
        The ``q(x, y)`` the source expects the settings to be drawn from.
    rate : float
        Trials per second.
    chunk : int
        Trials answered by one strategy choice.
    """

    def __init__(
        self,
        functional: BellFunctional,
        setting_probabilities: ArrayLike,
        rate: float = 1000.0,
        chunk: int = 1,
    ) -> None:
        if isinstance(chunk, bool) or not isinstance(chunk, (int, np.integer)) or chunk < 1:
            raise LocalSourceError(f"chunk must be a positive integer, got {chunk!r}")
        self.functional = functional
        self.scenario = functional.scenario
        self.q = _check_q(setting_probabilities, self.scenario.shape[:2])
        self.rate = _check_rate(rate)
        self.chunk = int(chunk)
        self.memory = np.zeros(self.scenario.shape, dtype=np.int64)
        #: strategies used for the trials of the last :meth:`sample` call, shapes (n, m_A), (n, m_B)
        self.last_strategies: tuple[NDArray[np.int64], NDArray[np.int64]] | None = None

    def trial_rate(self, t: float) -> float:
        return self.rate

    def _next_strategy(self) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        n_xy = self.memory.sum(axis=(2, 3))
        weights = self.q / (n_xy + 1.0)
        opt = maximize_over_strategies(weights[:, :, None, None] * self.functional.coefficients)
        return np.asarray(opt.strategy_a), np.asarray(opt.strategy_b)

    def sample(
        self, rng: np.random.Generator, t: float, x: NDArray[np.int64], y: NDArray[np.int64]
    ) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        x = np.asarray(x, dtype=np.int64)
        y = np.asarray(y, dtype=np.int64)
        if x.shape != y.shape or x.ndim != 1:
            raise LocalSourceError(
                f"x and y must be equal-length 1-d arrays, got {x.shape}, {y.shape}"
            )
        a = np.empty_like(x)
        b = np.empty_like(y)
        used_a = np.empty((x.size, self.scenario.settings_a), dtype=np.int64)
        used_b = np.empty((x.size, self.scenario.settings_b), dtype=np.int64)
        for start in range(0, x.size, self.chunk):
            sl = slice(start, start + self.chunk)
            sa, sb = self._next_strategy()  # fixed before looking at this chunk's settings
            a[sl], b[sl] = sa[x[sl]], sb[y[sl]]
            used_a[sl], used_b[sl] = sa, sb
            np.add.at(self.memory, (x[sl], y[sl], a[sl], b[sl]), 1)
        self.last_strategies = (used_a, used_b)
        return a, b


def adaptive_local_counts(
    rng: np.random.Generator,
    functional: BellFunctional,
    setting_probabilities: ArrayLike,
    batch_sizes: Iterable[int],
    runs: int,
) -> Iterator[NDArray[np.int64]]:
    """Batch counts of ``runs`` independent adaptive local sources, trial by trial.

    Each run keeps its own memory and chooses every trial's strategy by the rule of
    :class:`AdaptiveLocalSource` (``chunk=1``) before that trial's settings are drawn from ``q``.  Vectorised over runs, one Python step per trial.

    Yields
    ------
    ndarray, shape (runs, m_A, m_B, d_A, d_B)
        Counts of each batch (trials of ``batch_sizes`` in turn).
    """
    shape = functional.coefficients.shape
    m_a, m_b, d_a, d_b = shape
    q = _check_q(setting_probabilities, (m_a, m_b))
    q_flat = q.ravel()
    table = _VertexTable(functional)
    pairs = m_a * m_b
    cells = d_a * d_b
    # flat cell index (within its setting pair) of every vertex's answer: (V, pairs)
    pair_x = np.arange(pairs) // m_b
    pair_y = np.arange(pairs) % m_b
    answer = table.a[:, pair_x] * d_b + table.b[:, pair_y]
    n = np.zeros((runs, pairs))
    cum_q = np.cumsum(q_flat)
    cum_q[-1] = 1.0
    offset = np.arange(runs) * (pairs * cells)
    flat_n = n.reshape(-1)
    for size in batch_sizes:
        size = int(size)
        # settings are drawn independently of everything, so drawing the batch's settings
        # up front changes nothing: each strategy below is still chosen before its trial
        drawn = np.searchsorted(cum_q, rng.random((size, runs)), side="right")
        hits = np.empty((size, runs), dtype=np.int64)
        for i in range(size):
            v = _choose(table, q_flat, n)  # from the memory of earlier trials only
            pair = drawn[i]
            hits[i] = offset + pair * cells + answer[v, pair]
            flat_n[offset // cells + pair] += 1
        batch = np.bincount(hits.ravel(), minlength=runs * pairs * cells)
        yield batch.reshape((runs,) + shape)
