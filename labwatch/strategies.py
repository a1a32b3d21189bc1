"""Deterministic local strategies and exact maximisation of linear functionals over them.

A deterministic strategy of a party with ``m`` settings and ``d`` outcomes is a tuple
``alpha`` in ``{0..d-1}**m``: outcome ``alpha[x]`` for setting ``x``.  A pair of strategies
``(alpha, beta)`` is a vertex of the local polytope, ``p(a,b|x,y) = [a == alpha[x]] [b == beta[y]]``.

The maximum of a linear functional ``sum beta[x,y,a,b] p(a,b|x,y)`` over the local polytope is
attained at a vertex.  We enumerate the strategies of the party with fewer of them and let the
other party play its best response setting by setting, which is exact and costs
``O(min(d_A**m_A, d_B**m_B) * m_A * m_B * d)`` instead of the full vertex count.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "StrategyOptimum",
    "party_strategies",
    "maximize_over_strategies",
    "vertex_values",
    "vertex_tensor",
]

#: Strategies processed per vectorised chunk; bounds memory to a few tens of MB.
_CHUNK = 1 << 15
#: Refuse enumerations beyond this many strategies of the smaller party.
MAX_ENUMERATED_STRATEGIES = 1 << 26


@dataclass(frozen=True)
class StrategyOptimum:
    """The best deterministic strategy pair for a linear functional.

    Attributes
    ----------
    value : float
        ``max`` over deterministic strategies of ``sum coefficients * vertex``.
    strategy_a, strategy_b : tuple of int
        Alice's outcome for each of her settings, Bob's for each of his.
    """

    value: float
    strategy_a: tuple[int, ...]
    strategy_b: tuple[int, ...]


def party_strategies(
    settings: int, outcomes: int, start: int = 0, stop: int | None = None
) -> NDArray[np.int64]:
    """Deterministic strategies of one party as rows of an ``(n, settings)`` integer array.

    Strategy number ``k`` has outcome ``(k // outcomes**x) % outcomes`` for setting ``x``
    (setting 0 is the fastest digit).  ``start``/``stop`` select a slice of the enumeration.
    """
    total = outcomes**settings
    stop = total if stop is None else min(stop, total)
    k = np.arange(start, stop, dtype=np.int64)
    powers = outcomes ** np.arange(settings, dtype=np.int64)
    return (k[:, None] // powers[None, :]) % outcomes


def _best_response_values(
    coefficients: NDArray[np.float64], strategies: NDArray[np.int64]
) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    """For each Alice strategy (rows), the best total value and Bob's best response.

    ``coefficients`` has shape ``(m_A, m_B, d_A, d_B)``.  Returns ``values`` of shape ``(n,)``
    and ``responses`` of shape ``(n, m_B)``.
    """
    m_a = coefficients.shape[0]
    # g[n, y, b] = sum_x coefficients[x, y, alpha_n[x], b]
    g = np.zeros((strategies.shape[0],) + coefficients.shape[1:2] + coefficients.shape[3:4])
    for x in range(m_a):
        g += np.transpose(coefficients[x][:, strategies[:, x], :], (1, 0, 2))
    responses = np.argmax(g, axis=2)
    values = np.take_along_axis(g, responses[:, :, None], axis=2)[:, :, 0].sum(axis=1)
    return values, responses


def maximize_over_strategies(coefficients: ArrayLike) -> StrategyOptimum:
    """Exact maximum of a linear functional over the local polytope.

    Parameters
    ----------
    coefficients : array_like, shape (m_A, m_B, d_A, d_B)
        Bell coefficients ``beta[x, y, a, b]``.

    Returns
    -------
    StrategyOptimum
        The maximum and one maximising strategy pair.
    """
    coeffs = np.asarray(coefficients, dtype=np.float64)
    if coeffs.ndim != 4:
        raise ValueError(f"coefficients need 4 axes [x, y, a, b], got shape {coeffs.shape}")
    m_a, m_b, d_a, d_b = coeffs.shape
    swapped = d_b**m_b < d_a**m_a
    if swapped:  # enumerate the party with fewer strategies
        coeffs = np.transpose(coeffs, (1, 0, 3, 2))
        m_a, m_b, d_a, d_b = coeffs.shape
    total = d_a**m_a
    if total > MAX_ENUMERATED_STRATEGIES:
        raise ValueError(
            f"{total} deterministic strategies of the smaller party exceed the enumeration cap "
            f"{MAX_ENUMERATED_STRATEGIES}"
        )
    best_value = -np.inf
    best_a: NDArray[np.int64] | None = None
    best_b: NDArray[np.int64] | None = None
    for start in range(0, total, _CHUNK):
        strategies = party_strategies(m_a, d_a, start, start + _CHUNK)
        values, responses = _best_response_values(coeffs, strategies)
        i = int(np.argmax(values))
        if values[i] > best_value:
            best_value = float(values[i])
            best_a, best_b = strategies[i], responses[i]
    assert best_a is not None and best_b is not None
    sa, sb = tuple(int(v) for v in best_a), tuple(int(v) for v in best_b)
    if swapped:
        sa, sb = sb, sa
    return StrategyOptimum(value=best_value, strategy_a=sa, strategy_b=sb)


def vertex_tensor(
    strategy_a: ArrayLike, strategy_b: ArrayLike, outcomes_a: int, outcomes_b: int
) -> NDArray[np.float64]:
    """The local-polytope vertex of one deterministic strategy pair, shape ``(m_A, m_B, d_A, d_B)``."""
    sa = np.asarray(strategy_a, dtype=np.int64)
    sb = np.asarray(strategy_b, dtype=np.int64)
    pa = np.eye(outcomes_a)[sa]  # (m_A, d_A)
    pb = np.eye(outcomes_b)[sb]  # (m_B, d_B)
    return np.einsum("xa,yb->xyab", pa, pb)


def vertex_values(coefficients: ArrayLike) -> NDArray[np.float64]:
    """Value of the functional at every vertex, shape ``(d_A**m_A, d_B**m_B)``.

    Brute force; meant for tests and small scenarios (refuses more than 10**7 vertices).
    Row ``i`` is Alice's strategy ``party_strategies(m_A, d_A)[i]``, column ``j`` Bob's.
    """
    coeffs = np.asarray(coefficients, dtype=np.float64)
    m_a, m_b, d_a, d_b = coeffs.shape
    n_a, n_b = d_a**m_a, d_b**m_b
    if n_a * n_b > 10**7:
        raise ValueError(f"{n_a * n_b} vertices are too many for brute-force evaluation")
    sa = party_strategies(m_a, d_a)
    sb = party_strategies(m_b, d_b)
    out = np.zeros((n_a, n_b))
    for x in range(m_a):
        for y in range(m_b):
            out += coeffs[x, y][sa[:, x][:, None], sb[:, y][None, :]]
    return out
