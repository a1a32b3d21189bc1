"""Prediction-based-ratio (PBR) test factors for many streams at once.

For a predicted behaviour ``p_hat`` (smoothed past frequencies) the PBR factor is
``R = p_hat / p_LR`` with ``p_LR`` the KL projection of ``p_hat`` onto the local polytope
(Zhang, Glancy & Knill, PRA 84, 062118 (2011)).  At the exact projection
``max over deterministic (A, B) of sum_xy q R(A_x, B_y | x, y) = 1`` (PRA 88, 052119 (2013)); a
numerical projection is only close, so the factor is divided by that maximum whenever it
exceeds one, which makes it valid exactly.

Small scenarios (all vertices fit in a dense table) solve the projections of all streams
together by multiplicative (EM) updates of the vertex weights, warm-started from the previous
batch, and polish the streams that have not converged with the Frank-Wolfe solver of
:mod:`labwatch.stats.klprojection`; the maximum over strategies is then an exhaustive pass over
the table.  Larger scenarios use Frank-Wolfe per stream and
:func:`labwatch.strategies.maximize_over_strategies`.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from labwatch.scenario import Scenario
from labwatch.stats._checks import StatsError
from labwatch.stats.klprojection import LocalProjection, kl_projection
from labwatch.strategies import maximize_over_strategies, party_strategies

__all__ = ["PBRFactors"]

#: Dense vertex tables up to this many entries (vertices x cells).
_MAX_TABLE = 1 << 22
#: Multiplicative updates per batch; streams whose gap stays above _POLISH get Frank-Wolfe.
#: A gap g left in place costs at most g nats per trial (the factor is divided by 1 + g).
_EM_STEPS = 300
_GAP_TOL = 1e-7
_POLISH = 1e-4


class PBRFactors:
    """PBR test factors for ``runs`` streams of one scenario.

    Parameters
    ----------
    scenario : Scenario
    setting_probabilities : ndarray, shape (m_A, m_B)
    runs : int
    """

    def __init__(self, scenario: Scenario, setting_probabilities: NDArray[np.float64], runs: int):
        self.scenario = scenario
        self.q = setting_probabilities
        self.runs = runs
        m_a, m_b, d_a, d_b = scenario.shape
        n_vertices = d_a**m_a * d_b**m_b
        self._projections: list[LocalProjection | None] = [None] * runs
        self.table: NDArray[np.float64] | None = None
        if n_vertices * scenario.size <= _MAX_TABLE:
            sa = np.repeat(party_strategies(m_a, d_a), d_b**m_b, axis=0)
            sb = np.tile(party_strategies(m_b, d_b), (d_a**m_a, 1))
            pair = np.arange(m_a)[:, None] * m_b + np.arange(m_b)[None, :]
            cells = pair[None] * (d_a * d_b) + sa[:, :, None] * d_b + sb[:, None, :]
            table = np.zeros((n_vertices, scenario.size))
            table[np.arange(n_vertices)[:, None], cells.reshape(n_vertices, -1)] = 1.0
            self.table = table
            self.strategies_a, self.strategies_b = sa, sb
            self._weights = np.full((runs, n_vertices), 1.0 / n_vertices)

    def factors(
        self, predicted: NDArray[np.float64], active: NDArray[np.bool_]
    ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Factors for the next batch from predicted behaviours.

        Parameters
        ----------
        predicted : ndarray, shape (runs, m_A*m_B*d_A*d_B)
            ``p_hat(a,b|x,y)`` per stream, flattened in ``[x, y, a, b]`` order, all > 0.
        active : ndarray of bool, shape (runs,)
            Streams that bet; the others get the factor 1.

        Returns
        -------
        log_factor : ndarray, shape (runs, cells)
        bound : ndarray, shape (runs,)
            ``max over deterministic strategies of sum_xy q F`` (<= 1), exhaustive.
        """
        log_factor = np.zeros_like(predicted)
        bound = np.ones(self.runs)
        idx = np.nonzero(active)[0]
        if idx.size == 0:
            return log_factor, bound
        d = self.scenario.outcomes_a * self.scenario.outcomes_b
        q_cells = np.repeat(self.q.ravel(), d)
        joint = predicted[idx] * q_cells[None, :]
        local = self._project(predicted[idx], joint, idx)
        ratio = predicted[idx] / local
        b = self._max_over_strategies(ratio * q_cells[None, :])
        over = b > 1.0
        if np.any(over):  # inexact projection: divide so that the condition holds despite round-off
            ratio[over] /= (b[over] * (1.0 + 1e-12))[:, None]
            b[over] = self._max_over_strategies(ratio[over] * q_cells[None, :])
            if np.any(b > 1.0):
                raise StatsError(f"PBR factor could not be made valid (bound {b.max()!r})")
        log_factor[idx] = np.log(ratio)
        bound[idx] = b
        return log_factor, bound

    def _max_over_strategies(self, weighted: NDArray[np.float64]) -> NDArray[np.float64]:
        if self.table is not None:
            return (weighted @ self.table.T).max(axis=1)
        shape = self.scenario.shape  # weights already include q
        return np.array([maximize_over_strategies(w.reshape(shape)).value for w in weighted])

    def _project(
        self, predicted: NDArray[np.float64], joint: NDArray[np.float64], idx: NDArray[np.int64]
    ) -> NDArray[np.float64]:
        """Closest local behaviours (flattened) for the streams ``idx``."""
        shape = self.scenario.shape
        out = np.empty_like(predicted)
        todo = np.arange(idx.size)
        if self.table is not None:
            table = self.table
            mu = self._weights[idx]
            mu = (1.0 - 1e-6) * mu + 1e-6 / mu.shape[1]  # revive weights that collapsed to ~0
            live = np.arange(idx.size)  # streams still iterating (each stops on its own gap)
            for step in range(_EM_STEPS):
                grad = (joint[live] / (mu[live] @ table)) @ table.T  # sum q p_hat / p_L per vertex
                if step % 25 == 24:
                    going = grad.max(axis=1) - 1.0 > _GAP_TOL
                    live, grad = live[going], grad[going]
                    if live.size == 0:
                        break
                new = mu[live] * grad
                mu[live] = new / new.sum(axis=1, keepdims=True)
            self._weights[idx] = mu
            p = mu @ table
            gap = ((joint / p) @ table.T).max(axis=1) - 1.0
            out[:] = p
            todo = np.nonzero(gap > _POLISH)[0]
        latest: LocalProjection | None = None
        for j in todo:
            r = int(idx[j])
            start = self._projections[r]
            if self.table is not None:
                keep = self._weights[r] > 1e-12
                start = LocalProjection(
                    behaviour=predicted[j].reshape(shape),
                    setting_probabilities=self.q,
                    closest=out[j].reshape(shape),
                    divergence=np.nan,
                    gap=np.nan,
                    strategies_a=self.strategies_a[keep],
                    strategies_b=self.strategies_b[keep],
                    weights=self._weights[r][keep] / self._weights[r][keep].sum(),
                    iterations=0,
                    converged=False,
                )
            elif start is None:
                start = latest  # another stream's solution: only the solver's path changes
            proj = kl_projection(
                predicted[j].reshape(shape), self.q, tol=_GAP_TOL, warm_start=start
            )
            self._projections[r] = latest = proj
            out[j] = proj.closest.ravel()
            if self.table is not None:  # carry the polished mixture into the next EM round
                w = np.zeros(self.table.shape[0])
                n_b = self.scenario.outcomes_b**self.scenario.settings_b
                ka = _strategy_index(proj.strategies_a, self.scenario.outcomes_a)
                kb = _strategy_index(proj.strategies_b, self.scenario.outcomes_b)
                np.add.at(w, ka * n_b + kb, proj.weights)
                self._weights[r] = w
        return out


def _strategy_index(strategies: NDArray[np.int64], outcomes: int) -> NDArray[np.int64]:
    """Enumeration index of strategy rows (setting 0 is the fastest digit)."""
    powers = outcomes ** np.arange(strategies.shape[1], dtype=np.int64)
    return strategies @ powers
