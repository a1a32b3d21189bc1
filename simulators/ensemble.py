"""Vectorised batch counts of many independent i.i.d. runs, for Monte-Carlo studies.

A run of random-setting trials from a memoryless source is, batch by batch, a multinomial draw
over the cells ``(x, y, a, b)`` with probabilities ``q(x, y) p(a, b | x, y)``; settings held in
blocks give one multinomial per setting pair instead.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labwatch.scenario import Scenario

__all__ = ["block_counts", "random_setting_counts"]


def random_setting_counts(
    rng: np.random.Generator,
    behaviour: ArrayLike,
    setting_probabilities: ArrayLike,
    batch_sizes: Iterable[int],
    runs: int,
) -> Iterator[NDArray[np.int64]]:
    """Counts of ``runs`` independent random-setting runs, one batch at a time.

    Parameters
    ----------
    rng : numpy.random.Generator
    behaviour : array_like, shape (m_A, m_B, d_A, d_B)
        ``p(a, b | x, y)`` of the i.i.d. source.
    setting_probabilities : array_like, shape (m_A, m_B)
        ``q(x, y)``, drawn afresh for every trial.
    batch_sizes : iterable of int
        Trials per batch.
    runs : int

    Yields
    ------
    ndarray, shape (runs, m_A, m_B, d_A, d_B)
    """
    scenario = Scenario.from_shape(np.shape(behaviour))
    p = scenario.check_probabilities(behaviour)
    q = np.asarray(setting_probabilities, dtype=np.float64)
    if q.shape != scenario.shape[:2] or np.any(q < 0) or abs(q.sum() - 1) > 1e-9:
        raise ValueError(f"setting probabilities must be a {scenario.shape[:2]} distribution")
    joint = np.clip((q[:, :, None, None] * p).ravel(), 0.0, None)
    joint /= joint.sum()
    for size in batch_sizes:
        yield rng.multinomial(int(size), joint, size=runs).reshape((runs,) + scenario.shape)


def block_counts(
    rng: np.random.Generator,
    behaviour: ArrayLike,
    trials_per_pair: ArrayLike,
    runs: int,
) -> NDArray[np.int64]:
    """One block of counts per run with a fixed number of trials for each setting pair.

    Parameters
    ----------
    behaviour : array_like, shape (m_A, m_B, d_A, d_B)
    trials_per_pair : array_like of int, shape (m_A, m_B)
    runs : int

    Returns
    -------
    ndarray, shape (runs, m_A, m_B, d_A, d_B)
    """
    scenario = Scenario.from_shape(np.shape(behaviour))
    p = scenario.check_probabilities(behaviour)
    n = np.asarray(trials_per_pair, dtype=np.int64)
    if n.shape != scenario.shape[:2] or np.any(n < 0):
        raise ValueError(f"trials_per_pair must be non-negative integers of shape {n.shape}")
    m_a, m_b, d_a, d_b = scenario.shape
    out = np.zeros((runs, m_a, m_b, d_a * d_b), dtype=np.int64)
    for x in range(m_a):
        for y in range(m_b):
            cell = np.clip(p[x, y].ravel(), 0.0, None)
            out[:, x, y] = rng.multinomial(int(n[x, y]), cell / cell.sum(), size=runs)
    return out.reshape((runs,) + scenario.shape)
