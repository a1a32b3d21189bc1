"""Collins-Gisin coordinates of no-signalling correlations and of local vertices.

A no-signalling tensor ``p[x, y, a, b]`` is fixed by ``n_A * n_B`` numbers, with
``n_A = 1 + m_A (d_A - 1)`` and ``n_B = 1 + m_B (d_B - 1)``, arranged as a matrix ``C`` with

* ``C[0, 0] = 1`` (normalisation),
* ``C[1 + x (d_A - 1) + a, 0] = p_A(a | x)`` for ``a < d_A - 1``,
* ``C[0, 1 + y (d_B - 1) + b] = p_B(b | y)`` for ``b < d_B - 1``,
* ``C[1 + x (d_A - 1) + a, 1 + y (d_B - 1) + b] = p(a, b | x, y)``.

The last outcome of each setting is left out: normalisation fixes it.  A deterministic
vertex ``(alpha, beta)`` has ``C = outer(party_vector(alpha), party_vector(beta))``, which is
what makes column building and pricing cheap.

For a tensor that signals slightly, :func:`to_cg` reads each marginal as its average over the
other party's settings (a linear map ``M``); :func:`from_cg` is the inverse map ``R`` on the
no-signalling span (``M R = identity``).  A linear functional ``y . C`` of the coordinates is
the Bell functional ``beta = M^T y`` of the full tensor (:func:`functional_from_cg`).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from labwatch.scenario import Scenario

__all__ = [
    "cg_dimension",
    "from_cg",
    "functional_from_cg",
    "functional_to_cg",
    "party_dimension",
    "party_vectors",
    "to_cg",
    "vertex_columns",
]


def party_dimension(settings: int, outcomes: int) -> int:
    """Length ``1 + m (d - 1)`` of one party's coordinate vector."""
    return 1 + settings * (outcomes - 1)


def cg_dimension(scenario: Scenario) -> int:
    """Number of Collins-Gisin coordinates ``n_A * n_B`` (including the constant one)."""
    return party_dimension(scenario.settings_a, scenario.outcomes_a) * party_dimension(
        scenario.settings_b, scenario.outcomes_b
    )


def party_vectors(strategies: NDArray[np.int64], outcomes: int) -> NDArray[np.float64]:
    """Coordinate vectors of deterministic strategies, shape ``(n, 1 + m (d - 1))``.

    Entry 0 is 1; entry ``1 + x (d - 1) + a`` is ``[strategies[:, x] == a]`` for ``a < d - 1``.
    """
    n, m = strategies.shape
    out = np.zeros((n, party_dimension(m, outcomes)))
    out[:, 0] = 1.0
    rows = np.arange(n)
    for x in range(m):
        a = strategies[:, x]
        keep = a < outcomes - 1
        out[rows[keep], 1 + x * (outcomes - 1) + a[keep]] = 1.0
    return out


def vertex_columns(
    strategies_a: NDArray[np.int64],
    strategies_b: NDArray[np.int64],
    outcomes_a: int,
    outcomes_b: int,
) -> tuple[NDArray[np.int64], NDArray[np.int64], NDArray[np.float64]]:
    """Sparse CSC data (``starts``, ``indices``, ``values``) of vertex columns.

    Column ``j`` is the vertex ``(strategies_a[j], strategies_b[j])`` in coordinates
    flattened row-major (``C[i, k]`` at ``i * n_B + k``); all its entries are 1.
    """
    n = strategies_a.shape[0]
    n_b = party_dimension(strategies_b.shape[1], outcomes_b)
    sup_a = 1 + np.sum(strategies_a < outcomes_a - 1, axis=1)
    sup_b = 1 + np.sum(strategies_b < outcomes_b - 1, axis=1)
    counts = sup_a * sup_b
    starts = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=starts[1:])
    indices = np.empty(int(starts[-1]), dtype=np.int64)
    m_a, m_b = strategies_a.shape[1], strategies_b.shape[1]
    # Padded index arrays; slots of the dropped last outcome hold -1 and are masked out.
    pa = 1 + np.arange(m_a)[None, :] * (outcomes_a - 1) + strategies_a
    pa = np.where(strategies_a < outcomes_a - 1, pa, -1)
    pa = np.concatenate([np.zeros((n, 1), dtype=np.int64), pa], axis=1)
    pb = 1 + np.arange(m_b)[None, :] * (outcomes_b - 1) + strategies_b
    pb = np.where(strategies_b < outcomes_b - 1, pb, -1)
    pb = np.concatenate([np.zeros((n, 1), dtype=np.int64), pb], axis=1)
    kron = pa[:, :, None] * n_b + pb[:, None, :]  # ascending within each column
    mask = (pa[:, :, None] >= 0) & (pb[:, None, :] >= 0)
    indices[:] = kron[mask]
    return starts, indices, np.ones(indices.shape[0])


def _selectors(settings: int, outcomes: int) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """``S`` (coordinates from per-setting marginals) and ``T`` (its inverse on the span).

    Shapes ``(n, m d)`` and ``(m d, n)`` with ``n = 1 + m (d - 1)``; ``S T = identity``.
    """
    n = party_dimension(settings, outcomes)
    s = np.zeros((n, settings * outcomes))
    t = np.zeros((settings * outcomes, n))
    s[0, :] = 1.0 / settings
    for x in range(settings):
        t[x * outcomes + outcomes - 1, 0] = 1.0
        for a in range(outcomes - 1):
            i = 1 + x * (outcomes - 1) + a
            s[i, x * outcomes + a] = 1.0
            t[x * outcomes + a, i] = 1.0
            t[x * outcomes + outcomes - 1, i] = -1.0
    return s, t


def _as_matrix(p: NDArray[np.float64]) -> NDArray[np.float64]:
    m_a, m_b, d_a, d_b = p.shape
    return p.transpose(0, 2, 1, 3).reshape(m_a * d_a, m_b * d_b)


def _as_tensor(mat: NDArray[np.float64], scenario: Scenario) -> NDArray[np.float64]:
    m_a, m_b, d_a, d_b = scenario.shape
    return np.ascontiguousarray(mat.reshape(m_a, d_a, m_b, d_b).transpose(0, 2, 1, 3))


def to_cg(p: NDArray[np.float64]) -> NDArray[np.float64]:
    """Coordinates ``M p`` of a tensor, flattened row-major, length ``n_A * n_B``."""
    scenario = Scenario.from_shape(p.shape)
    s_a, _ = _selectors(scenario.settings_a, scenario.outcomes_a)
    s_b, _ = _selectors(scenario.settings_b, scenario.outcomes_b)
    return (s_a @ _as_matrix(p) @ s_b.T).ravel()


def from_cg(c: NDArray[np.float64], scenario: Scenario) -> NDArray[np.float64]:
    """The no-signalling tensor ``R c`` with coordinates ``c``, shape ``(m_A, m_B, d_A, d_B)``."""
    _, t_a = _selectors(scenario.settings_a, scenario.outcomes_a)
    _, t_b = _selectors(scenario.settings_b, scenario.outcomes_b)
    mat = np.asarray(c, dtype=np.float64).reshape(t_a.shape[1], t_b.shape[1])
    return _as_tensor(t_a @ mat @ t_b.T, scenario)


def functional_from_cg(y: NDArray[np.float64], scenario: Scenario) -> NDArray[np.float64]:
    """Coefficients ``beta = M^T y`` with ``sum(beta * p) == y . to_cg(p)`` for every ``p``."""
    s_a, _ = _selectors(scenario.settings_a, scenario.outcomes_a)
    s_b, _ = _selectors(scenario.settings_b, scenario.outcomes_b)
    mat = np.asarray(y, dtype=np.float64).reshape(s_a.shape[0], s_b.shape[0])
    return _as_tensor(s_a.T @ mat @ s_b, scenario)


def functional_to_cg(coefficients: NDArray[np.float64]) -> NDArray[np.float64]:
    """Coordinates ``y = R^T beta`` with ``y . C(p) == sum(beta * p)`` for no-signalling ``p``."""
    beta = np.asarray(coefficients, dtype=np.float64)
    scenario = Scenario.from_shape(beta.shape)
    _, t_a = _selectors(scenario.settings_a, scenario.outcomes_a)
    _, t_b = _selectors(scenario.settings_b, scenario.outcomes_b)
    return (t_a.T @ _as_matrix(beta) @ t_b).ravel()
