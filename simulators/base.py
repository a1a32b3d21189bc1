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
        assert p is not None
        m_a, m_b, d_a, d_b = p.shape
        cdf = np.cumsum(p.reshape(m_a * m_b, d_a * d_b), axis=1)
        cdf[:, -1] = 1.0
        rows = np.asarray(x, dtype=np.int64) * m_b + np.asarray(y, dtype=np.int64)
        u = rng.random(rows.shape[0])
        # index of the first cdf entry above u, per row: offset rows into one flat search
        flat = (cdf + np.arange(m_a * m_b)[:, None]).ravel()
        idx = np.searchsorted(flat, u + rows, side="right") - rows * (d_a * d_b)
        idx = np.clip(idx, 0, d_a * d_b - 1)
        return idx // d_b, idx % d_b
