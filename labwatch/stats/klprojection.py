"""Projection of a behaviour onto the local polytope in relative entropy (KL divergence).

For a behaviour ``p(a,b|x,y)`` and a setting distribution ``q(x,y)`` we find the local
behaviour ``p_L`` minimising the setting-weighted KL divergence

    D(p || p_L) = sum_xy q(x,y) sum_ab p(a,b|x,y) ln[p(a,b|x,y) / p_L(a,b|x,y)]      (nats)

(van Dam, Gill & Grünwald, IEEE Trans. Inf. Theory 51, 2812 (2005); Zhang, Glancy & Knill,
PRA 84, 062118 (2011)).  ``p_L`` is a convex mixture of deterministic strategy pairs (vertices).

Algorithm: fully-corrective Frank-Wolfe.  The linear-minimisation oracle is the exact
maximisation over deterministic strategies of :mod:`labwatch.strategies`, which scales to many
settings; on the current set of vertices the mixture weights are optimised by Newton steps on the
simplex.  The Frank-Wolfe gap has a direct meaning here: with ``R = p / p_L``,

    gap = max over deterministic (A, B) of sum_xy q(x,y) R(A_x, B_y | x, y)  -  1,

so ``gap <= 0`` is exactly the condition of Zhang, Glancy & Knill, PRA 88, 052119 (2013) for
``R`` to be a valid test factor, and ``D - D_min <= gap`` bounds the suboptimality.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labwatch.scenario import Scenario
from labwatch.stats._checks import StatsError, check_setting_probabilities
from labwatch.strategies import maximize_over_strategies

__all__ = ["LocalProjection", "kl_projection"]

#: Vertices whose weight falls below this (relative to the largest) leave the active set.
_DROP = 1e-15


@dataclass(frozen=True)
class LocalProjection:
    """The closest local behaviour in setting-weighted KL divergence.

    Attributes
    ----------
    behaviour : ndarray, shape (m_A, m_B, d_A, d_B)
        The projected behaviour ``p(a,b|x,y)``.
    setting_probabilities : ndarray, shape (m_A, m_B)
        The weights ``q(x,y)``.
    closest : ndarray, shape (m_A, m_B, d_A, d_B)
        The minimiser ``p_L(a,b|x,y)`` (a local behaviour).
    divergence : float
        ``D(p || p_L)`` in nats (per trial, settings drawn from ``q``).
    gap : float
        Frank-Wolfe gap ``max_(A,B) sum_xy q R(A_x,B_y|x,y) - 1`` at the returned point, an upper
        bound on ``divergence - min D``; ``<= tol`` on convergence.
    strategies_a, strategies_b : ndarray, shapes (k, m_A), (k, m_B)
        The deterministic strategy pairs in the mixture.
    weights : ndarray, shape (k,)
        Their mixture weights (sum to one).
    iterations : int
        Frank-Wolfe iterations used.
    converged : bool
        Whether ``gap <= tol`` was reached.
    """

    behaviour: NDArray[np.float64] = field(repr=False)
    setting_probabilities: NDArray[np.float64] = field(repr=False)
    closest: NDArray[np.float64] = field(repr=False)
    divergence: float
    gap: float
    strategies_a: NDArray[np.int64] = field(repr=False)
    strategies_b: NDArray[np.int64] = field(repr=False)
    weights: NDArray[np.float64] = field(repr=False)
    iterations: int
    converged: bool

    @property
    def ratio(self) -> NDArray[np.float64]:
        """``R = p / p_L`` cell by cell (0 where ``p = 0``), shape (m_A, m_B, d_A, d_B)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.behaviour > 0, self.behaviour / self.closest, 0.0)


def _vertex_cells(
    strategies_a: NDArray[np.int64], strategies_b: NDArray[np.int64], d_a: int, d_b: int
) -> NDArray[np.int64]:
    """Flat cell index of every vertex for every setting pair, shape (k, m_A*m_B)."""
    k, m_a = strategies_a.shape
    m_b = strategies_b.shape[1]
    pair = (np.arange(m_a)[:, None] * m_b + np.arange(m_b)[None, :]).ravel()
    outcome = (strategies_a[:, :, None] * d_b + strategies_b[:, None, :]).reshape(k, m_a * m_b)
    return pair[None, :] * (d_a * d_b) + outcome


class _Mixture:
    """Mixture weights over an active set of vertices, with its objective pieces."""

    def __init__(self, w: NDArray[np.float64], n_cells: int) -> None:
        self.w = w
        self.pos = w > 0
        self.n_cells = n_cells

    def behaviour(self, cells: NDArray[np.int64], mu: NDArray[np.float64]) -> NDArray[np.float64]:
        return np.bincount(
            cells.ravel(), weights=np.repeat(mu, cells.shape[1]), minlength=self.n_cells
        )

    def objective(self, p: NDArray[np.float64]) -> float:
        # -sum w ln p over cells with w > 0 (constant terms of D dropped)
        pp = p[self.pos]
        if np.any(pp <= 0):
            return np.inf
        return float(-np.sum(self.w[self.pos] * np.log(pp)))

    def line_search(self, p: NDArray[np.float64], vertex: NDArray[np.float64]) -> float:
        """Frank-Wolfe step: minimise the objective on ``(1 - s) p + s vertex`` over ``s``."""
        w, pos = self.w[self.pos], self.pos
        diff = vertex[pos] - p[pos]

        pp = p[pos]

        def derivatives(s: float) -> tuple[float, float]:
            with np.errstate(divide="ignore", invalid="ignore"):
                ratio = diff / (pp + s * diff)
            return float(-np.sum(w * ratio)), float(np.sum(w * ratio * ratio))

        if derivatives(1.0)[0] <= 0 and np.isfinite(self.objective(vertex)):
            return 1.0
        # safeguarded Newton on the increasing slope; the face solve refines the weights later,
        # so a rough step suffices
        lo, hi, s = 0.0, 1.0, 0.0
        for _ in range(30):
            d1, d2 = derivatives(s)
            if not np.isfinite(d1) or d1 > 0:
                hi = s
            else:
                lo = s
            if np.isfinite(d1) and abs(d1) < 1e-12:
                break
            step = s - d1 / d2 if (np.isfinite(d1) and d2 > 0) else -1.0
            s = step if lo < step < hi else 0.5 * (lo + hi)
            if hi - lo < 1e-14:
                break
        return max(lo, 1e-300)

    def incidence(self, cells: NDArray[np.int64]) -> NDArray[np.float64]:
        """Dense 0/1 matrix vertex x (cells with w > 0)."""
        a = np.zeros((cells.shape[0], self.n_cells))
        a[np.arange(cells.shape[0])[:, None], cells] = 1.0
        return a[:, self.pos]

    def newton(self, cells: NDArray[np.int64], mu: NDArray[np.float64], tol: float, steps: int):
        """Newton iterations on the simplex of the active set; drops vertices that reach 0."""
        w = self.w[self.pos]
        inc = self.incidence(cells)

        def objective(weights: NDArray[np.float64]) -> float:
            pp = weights @ inc
            if np.any(pp <= 0):
                return np.inf
            return float(-(w @ np.log(pp)))

        for _ in range(steps):
            p = mu @ inc
            f = float(-(w @ np.log(p)))
            r = w / p
            g = -(inc @ r)
            # KKT on the face: every active vertex has sum_c r_c V_vc = sum_c w_c (= -mean g)
            if float(np.max(np.abs(g - mu @ g))) <= tol:
                break
            k = mu.shape[0]
            hessian = (inc * (r / p)) @ inc.T
            # symmetric diagonal scaling: cells with tiny p make H badly scaled, not singular
            diag = np.diag(hessian)
            scale = 1.0 / np.sqrt(np.maximum(diag, 1e-12 * diag.max()))
            kkt = np.zeros((k + 1, k + 1))
            kkt[:k, :k] = scale[:, None] * hessian * scale[None, :]
            kkt[:k, k] = scale
            kkt[k, :k] = scale
            rhs = np.concatenate([-scale * g, [0.0]])
            # least squares: vertex sets are often affinely dependent (H singular)
            delta = scale * np.linalg.lstsq(kkt, rhs, rcond=None)[0][:k]
            delta -= delta.mean()  # stay on the simplex despite round-off
            decrement = -float(g @ delta)
            if not (decrement > 0):
                break
            neg = delta < 0
            ratios = np.where(neg, mu / np.where(neg, -delta, 1.0), np.inf)
            blocking = int(np.argmin(ratios))
            if ratios[blocking] < 1e-6:
                # a vertex with negligible weight blocks the step: drop it if that is harmless
                keep = np.arange(k) != blocking
                if np.isfinite(objective(np.where(keep, mu, 0.0))):
                    cells, inc, mu = cells[keep], inc[keep], mu[keep] / mu[keep].sum()
                    continue
            # fraction-to-boundary: weights that belong at zero decay geometrically and are
            # dropped below _DROP; a log objective makes the quadratic model overshoot otherwise
            t = min(1.0, 0.9 * float(ratios[blocking]))
            accepted = None
            while t > 1e-14:
                trial = mu + t * delta
                if objective(trial) <= f - 1e-4 * t * decrement:
                    accepted = trial
                    break
                t *= 0.5
            if accepted is None:
                break  # no descent along the Newton direction: leave it to the outer loop
            keep = accepted > _DROP * accepted.max()
            if not np.all(keep) and not np.isfinite(objective(np.where(keep, accepted, 0.0))):
                keep = accepted > 0
            cells, inc, mu = cells[keep], inc[keep], accepted[keep] / accepted[keep].sum()
        return cells, mu


def kl_projection(
    behaviour: ArrayLike,
    setting_probabilities: ArrayLike | None = None,
    *,
    tol: float = 1e-11,
    max_iterations: int = 2000,
    warm_start: LocalProjection | None = None,
) -> LocalProjection:
    """Closest local behaviour to ``behaviour`` in setting-weighted KL divergence.

    Parameters
    ----------
    behaviour : array_like, shape (m_A, m_B, d_A, d_B)
        Conditional probabilities ``p(a,b|x,y)`` (each setting pair sums to one).
    setting_probabilities : array_like, shape (m_A, m_B), optional
        ``q(x,y)``; uniform when omitted.  Zeros are allowed (those pairs do not count).
    tol : float
        Stop when the Frank-Wolfe gap (an upper bound on the excess divergence, nats) is below.
    max_iterations : int
        Cap on Frank-Wolfe iterations; ``converged`` tells whether ``tol`` was reached.
    warm_start : LocalProjection, optional
        A previous projection in the same scenario; its vertices seed the active set.

    Returns
    -------
    LocalProjection

    Examples
    --------
    >>> import numpy as np
    >>> proj = kl_projection(np.full((2, 2, 2, 2), 0.25))  # white noise is local
    >>> round(proj.divergence, 12)
    0.0
    """
    scenario = Scenario.from_shape(np.shape(behaviour))
    p = scenario.check_probabilities(behaviour)
    p = np.clip(p, 0.0, None)
    p = p / p.sum(axis=(2, 3), keepdims=True)
    m_a, m_b, d_a, d_b = scenario.shape
    if setting_probabilities is None:
        q = np.full((m_a, m_b), 1.0 / (m_a * m_b))
    else:
        q = check_setting_probabilities(setting_probabilities, (m_a, m_b), strictly_positive=False)
    if not (tol > 0):
        raise StatsError(f"tol must be positive, got {tol!r}")
    w = (q[:, :, None, None] * p).ravel()
    n_cells = w.size
    mix = _Mixture(w, n_cells)

    # Start from white noise: the uniform mixture of the d_A*d_B constant strategy pairs.
    const_a = np.repeat(np.arange(d_a), d_b)[:, None] * np.ones((1, m_a), dtype=np.int64)
    const_b = np.tile(np.arange(d_b), d_a)[:, None] * np.ones((1, m_b), dtype=np.int64)
    sa, sb = const_a.astype(np.int64), const_b.astype(np.int64)
    mu = np.full(sa.shape[0], 1.0 / sa.shape[0])
    if warm_start is not None:
        if warm_start.closest.shape != scenario.shape:
            raise StatsError(
                f"warm start has shape {warm_start.closest.shape}, behaviour {scenario.shape}"
            )
        warm_cells = _vertex_cells(warm_start.strategies_a, warm_start.strategies_b, d_a, d_b)
        if np.all(mix.behaviour(warm_cells, warm_start.weights)[mix.pos] > 0):
            sa, sb, mu = warm_start.strategies_a, warm_start.strategies_b, warm_start.weights
        else:  # the old mixture misses a cell that now has weight: add some white noise
            sa = np.concatenate([warm_start.strategies_a, sa])
            sb = np.concatenate([warm_start.strategies_b, sb])
            mu = np.concatenate([(1 - 1e-3) * warm_start.weights, 1e-3 * mu])
    cells = _vertex_cells(sa, sb, d_a, d_b)
    cells, inverse = np.unique(cells, axis=0, return_inverse=True)
    mu = np.bincount(inverse.ravel(), weights=mu, minlength=cells.shape[0])
    gap = np.inf
    iterations = 0
    stalls = 0
    for iterations in range(1, max_iterations + 1):  # noqa: B007
        cells, mu = mix.newton(cells, mu, 0.1 * tol, steps=100)
        p_local = mix.behaviour(cells, mu)
        r = np.zeros(n_cells)
        r[mix.pos] = w[mix.pos] / p_local[mix.pos]
        best = maximize_over_strategies(r.reshape(scenario.shape))
        gap = best.value - float(w.sum())
        if gap <= tol:
            break
        new = _vertex_cells(
            np.asarray([best.strategy_a], dtype=np.int64),
            np.asarray([best.strategy_b], dtype=np.int64),
            d_a,
            d_b,
        )
        if np.any(np.all(cells == new, axis=1)):
            # the oracle's vertex is already active: polish the face optimum, give up if stuck
            stalls += 1
            if stalls > 3:
                break
            cells, mu = mix.newton(cells, mu, 0.01 * tol, steps=300)
            continue
        stalls = 0
        step = mix.line_search(p_local, mix.behaviour(new, np.ones(1)))
        cells = np.concatenate([cells, new])
        mu = np.concatenate([mu * (1 - step), [step]])
    p_local = mix.behaviour(cells, mu)
    closest = p_local.reshape(scenario.shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(w > 0, w * (np.log(np.where(w > 0, p.ravel(), 1.0)) - np.log(p_local)), 0)
    divergence = max(float(np.sum(terms)), 0.0)
    pair_cells = cells - (np.arange(m_a * m_b) * d_a * d_b)[None, :]
    out_a = (pair_cells // d_b).reshape(-1, m_a, m_b)[:, :, 0]
    out_b = (pair_cells % d_b).reshape(-1, m_a, m_b)[:, 0, :]
    return LocalProjection(
        behaviour=p,
        setting_probabilities=q,
        closest=closest,
        divergence=divergence,
        gap=float(gap),
        strategies_a=out_a.astype(np.int64),
        strategies_b=out_b.astype(np.int64),
        weights=mu,
        iterations=iterations,
        converged=bool(gap <= tol),
    )
