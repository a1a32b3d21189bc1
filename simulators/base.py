"""The interface every simulated pair source implements.

A source produces *trials*: one trial is one detected pair (or, for sources that keep the
no-click outcome, one pulse/heralding window).  The publisher asks the source how many trials
to expect per second and to sample outcomes for given setting choices; it then bins them into
histogram blocks or ships them as per-trial events.
"""

from __future__ import annotations

from abc import ABC, abstractmethod

import numpy as np
from numpy.typing import NDArray

from labwatch.scenario import Scenario

__all__ = ["PairSource", "ProbabilitySource"]


class PairSource(ABC):
    """A seeded source of trials with outcomes ``(a, b)`` for settings ``(x, y)``.

    Subclasses must be deterministic given the ``rng`` they are handed.
    """

    #: The Bell scenario of the trials this source produces.
    scenario: Scenario

    @abstractmethod
    def trial_rate(self, t: float) -> float:
        """Expected trials (detected coincidences) per second at source time ``t`` (s)."""

    @abstractmethod
    def sample(
        self, rng: np.random.Generator, t: float, x: NDArray[np.int64], y: NDArray[np.int64]
    ) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        """Outcomes ``(a, b)`` for trials with settings ``x``, ``y`` (equal-length arrays).

        A local source must fix its response before looking at ``x``/``y`` of a trial; it may
        use everything it saw in earlier calls (memory).
        """

    def probabilities(self, t: float) -> NDArray[np.float64] | None:
        """Expected ``p(a,b|x,y)`` at time ``t`` when the source is i.i.d., else ``None``."""
        return None

    def singles_rates(self, t: float) -> tuple[NDArray[np.float64], NDArray[np.float64]] | None:
        """Expected singles rates (Hz) of Alice's and Bob's detectors, when modelled."""
        return None


class ProbabilitySource(PairSource):
    """A memoryless source that samples from ``probabilities(t)`` (Born rule or a fixed tensor).

    Sampling is vectorised: one inverse-CDF lookup per trial, no Python loop per trial.
    """

    def sample(
        self, rng: np.random.Generator, t: float, x: NDArray[np.int64], y: NDArray[np.int64]
    ) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        p = self.probabilities(t)
        if p is None:
            raise TypeError(f"{type(self).__name__}.probabilities(t) returned None")
        p = np.clip(np.asarray(p, dtype=np.float64), 0.0, None)
        m_a, m_b, d_a, d_b = p.shape
        xs = np.asarray(x, dtype=np.int64)
        ys = np.asarray(y, dtype=np.int64)
        if xs.shape != ys.shape or xs.ndim != 1:
            raise ValueError(
                f"x and y must be 1-D arrays of equal length, got {xs.shape}, {ys.shape}"
            )
        if xs.size and (xs.min() < 0 or xs.max() >= m_a or ys.min() < 0 or ys.max() >= m_b):
            raise ValueError(f"settings out of range: x must be in [0, {m_a}), y in [0, {m_b})")
        flat_p = p.reshape(m_a * m_b, d_a * d_b)
        totals = flat_p.sum(axis=1)
        if np.any(~np.isfinite(totals)) or np.any(totals <= 0):
            raise ValueError("every setting pair needs a finite, positive total probability")
        cdf = np.cumsum(flat_p, axis=1) / totals[:, None]
        # At and after the last outcome of non-zero probability the cdf is exactly 1, so
        # rounding in the cumulative sum can never select a zero-probability tail outcome.
        last = d_a * d_b - 1 - np.argmax(flat_p[:, ::-1] > 0, axis=1)
        cdf[np.arange(d_a * d_b)[None, :] >= last[:, None]] = 1.0
        rows = xs * m_b + ys
        u = rng.random(rows.shape[0])
        # Inverse-CDF lookup for all trials in one search: row r of the cdf is shifted into
        # [r, r + 1], so the flat array stays sorted.  ``u + r`` can round up to ``r + 1``
        # when u is close to 1; cap it just below ``r + 1`` so it stays in its own row.
        flat = (cdf + np.arange(m_a * m_b)[:, None]).ravel()
        offset = rows.astype(np.float64)
        v = np.minimum(u + offset, np.nextafter(offset + 1.0, -np.inf))
        idx = np.searchsorted(flat, v, side="right") - rows * (d_a * d_b)
        return idx // d_b, idx % d_b
