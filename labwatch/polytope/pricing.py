"""Pricing oracle: the deterministic strategies that score highest on a coordinate functional.

For a functional ``F(C) = sum_ik Y[i, k] C[i, k]`` of the Collins-Gisin coordinates
(:mod:`labwatch.polytope.coordinates`), a vertex ``(alpha, beta)`` scores
``u(alpha)^T Y w(beta)`` with party vectors ``u`` and ``w``.  We enumerate the party with fewer
strategies and give the other its best response setting by setting -- the same exact method
as :func:`labwatch.strategies.maximize_over_strategies`, written on coordinates so one chunk
is a single matrix product.  The oracle returns the ``k`` best enumerated strategies, each
with its best response, which is what column generation adds to the master LP.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from labwatch.polytope.coordinates import party_dimension, party_vectors
from labwatch.scenario import Scenario
from labwatch.strategies import MAX_ENUMERATED_STRATEGIES, party_strategies

__all__ = ["PricedVertices", "SIDES", "best_vertices", "best_vertices_both_sides"]

#: Enumerated strategies per vectorised chunk.
_CHUNK = 1 << 14
#: Which party :func:`best_vertices` enumerates.
SIDES = ("auto", "a", "b")
#: :func:`best_vertices_both_sides` also enumerates the larger party up to this many strategies.
BOTH_SIDES_LIMIT = 1 << 17


@dataclass(frozen=True)
class PricedVertices:
    """The best vertices found by the oracle, best first.

    Attributes
    ----------
    values : ndarray, shape (k,)
        ``F`` at each vertex.
    strategies_a : ndarray of int, shape (k, m_A)
    strategies_b : ndarray of int, shape (k, m_B)
    """

    values: NDArray[np.float64]
    strategies_a: NDArray[np.int64]
    strategies_b: NDArray[np.int64]


def _responses(g: NDArray[np.float64], settings: int, outcomes: int) -> tuple[NDArray, NDArray]:
    """Best-response values and outcomes given per-coordinate gains ``g`` (rows = strategies).

    The last outcome of each setting has coordinate gain 0.
    """
    n = g.shape[0]
    gains = np.zeros((n, settings, outcomes))
    gains[:, :, : outcomes - 1] = g[:, 1:].reshape(n, settings, outcomes - 1)
    best = np.argmax(gains, axis=2)
    values = g[:, 0] + np.take_along_axis(gains, best[:, :, None], axis=2)[:, :, 0].sum(axis=1)
    return values, best


def best_vertices(
    y: NDArray[np.float64], scenario: Scenario, k: int = 1, side: str = "auto"
) -> PricedVertices:
    """The ``k`` enumerated strategies with the highest ``F``, each with its best response.

    Parameters
    ----------
    y : ndarray, shape (n_A * n_B,)
        Functional on the coordinates, flattened row-major.
    scenario : Scenario
    k : int
        How many vertices to return (fewer when the enumerated party has fewer strategies).
    side : {"auto", "a", "b"}
        The party to enumerate; ``"auto"`` takes the one with fewer strategies.

    Returns
    -------
    PricedVertices
        The first entry is the exact maximum of ``F`` over the local polytope.
    """
    m_a, m_b, d_a, d_b = scenario.shape
    mat = np.asarray(y, dtype=np.float64).reshape(
        party_dimension(m_a, d_a), party_dimension(m_b, d_b)
    )
    if side not in SIDES:
        raise ValueError(f"side={side!r} is not one of {SIDES}")
    swapped = d_b**m_b < d_a**m_a if side == "auto" else side == "b"
    if swapped:
        mat = mat.T
        m_a, m_b, d_a, d_b = m_b, m_a, d_b, d_a
    total = d_a**m_a
    if total > MAX_ENUMERATED_STRATEGIES:
        raise ValueError(
            f"{total} strategies of the smaller party exceed the enumeration cap "
            f"{MAX_ENUMERATED_STRATEGIES}"
        )
    k = max(1, min(int(k), total))
    keep_v = np.empty(0)
    keep_a = np.empty((0, m_a), dtype=np.int64)
    keep_b = np.empty((0, m_b), dtype=np.int64)
    for start in range(0, total, _CHUNK):
        strategies = party_strategies(m_a, d_a, start, start + _CHUNK)
        values, responses = _responses(party_vectors(strategies, d_a) @ mat, m_b, d_b)
        if values.shape[0] > k:
            top = np.argpartition(-values, k - 1)[:k]
            values, strategies, responses = values[top], strategies[top], responses[top]
        keep_v = np.concatenate([keep_v, values])
        keep_a = np.concatenate([keep_a, strategies])
        keep_b = np.concatenate([keep_b, responses])
        if keep_v.shape[0] > k:
            top = np.argpartition(-keep_v, k - 1)[:k]
            keep_v, keep_a, keep_b = keep_v[top], keep_a[top], keep_b[top]
    order = np.argsort(-keep_v, kind="stable")
    keep_v, keep_a, keep_b = keep_v[order], keep_a[order], keep_b[order]
    if swapped:
        keep_a, keep_b = keep_b, keep_a
    return PricedVertices(values=keep_v, strategies_a=keep_a, strategies_b=keep_b)


def best_vertices_both_sides(
    y: NDArray[np.float64], scenario: Scenario, k: int = 1
) -> PricedVertices:
    """About ``k / 2`` best vertices enumerating each party (best response for the other).

    Merged without duplicates, best first.

    Two lists give more varied columns than one (each enumerated strategy brings only its
    best response).  Falls back to the smaller party alone when the larger one has more than
    ``BOTH_SIDES_LIMIT`` strategies.  The first entry is still the exact maximum.
    """
    m_a, m_b, d_a, d_b = scenario.shape
    if max(d_a**m_a, d_b**m_b) > BOTH_SIDES_LIMIT or k < 2:
        return best_vertices(y, scenario, k)
    one = best_vertices(y, scenario, k - k // 2, side="a")
    two = best_vertices(y, scenario, k // 2, side="b")
    values = np.concatenate([one.values, two.values])
    sa = np.concatenate([one.strategies_a, two.strategies_a])
    sb = np.concatenate([one.strategies_b, two.strategies_b])
    _, first = np.unique(np.concatenate([sa, sb], axis=1), axis=0, return_index=True)
    order = first[np.argsort(-values[first], kind="stable")]  # the lists may overlap
    return PricedVertices(values=values[order], strategies_a=sa[order], strategies_b=sb[order])
