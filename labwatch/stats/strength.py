"""Statistical strength of a behaviour against local realism.

The statistical strength (van Dam, Gill & Grünwald, IEEE Trans. Inf. Theory 51, 2812 (2005)) of
a behaviour ``p(a,b|x,y)`` measured with setting distribution ``q(x,y)`` is the smallest
setting-weighted KL divergence to a local behaviour,

    KL_q(p) = min over local p_L of  sum_xy q(x,y) sum_ab p(ab|xy) ln[p(ab|xy) / p_L(ab|xy)].

It is the best possible growth rate of ``ln(1/p-value)`` per trial of any test of local realism
for an i.i.d. source (Zhang, Glancy & Knill, PRA 84, 062118 (2011)), so no method can reach
``p <= p_target`` in fewer than about ``ln(1/p_target) / KL_q`` trials.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from labwatch.stats._checks import StatsError, check_level
from labwatch.stats.klprojection import LocalProjection, kl_projection

__all__ = ["StatisticalStrength", "statistical_strength"]


@dataclass(frozen=True)
class StatisticalStrength:
    """Setting-weighted KL divergence from a behaviour to the local polytope.

    Attributes
    ----------
    nats_per_trial : float
        ``KL_q`` in nats per trial (natural log).
    gap : float
        Upper bound on how much ``nats_per_trial`` may exceed the true minimum (solver gap).
    projection : LocalProjection
        The closest local behaviour and its mixture of deterministic strategies.
    assumptions : tuple of str
        ``i.i.d.`` (the limit is for a stationary memoryless source) and ``random settings``.
    """

    nats_per_trial: float
    gap: float
    projection: LocalProjection = field(repr=False)
    assumptions: tuple[str, ...] = ("i.i.d.", "random settings")

    @property
    def bits_per_trial(self) -> float:
        """``KL_q`` in bits per trial (log base 2)."""
        return self.nats_per_trial / math.log(2.0)

    def minimum_trials(self, p_target: float) -> float:
        """Implied minimum trials ``ln(1/p_target) / KL_q`` to reach ``p <= p_target``.

        ``inf`` for a local behaviour (zero strength).
        """
        p = check_level("p_target", p_target)
        if self.nats_per_trial <= 0:
            return math.inf
        return math.log(1.0 / p) / self.nats_per_trial


def statistical_strength(
    behaviour: ArrayLike,
    setting_probabilities: ArrayLike | None = None,
    *,
    tol: float = 1e-12,
) -> StatisticalStrength:
    """Statistical strength of ``behaviour`` against local realism, nats per trial.

    Parameters
    ----------
    behaviour : array_like, shape (m_A, m_B, d_A, d_B)
        Observed frequencies or modelled probabilities ``p(a,b|x,y)``.
    setting_probabilities : array_like, shape (m_A, m_B), optional
        ``q(x,y)``; uniform when omitted.
    tol : float
        Solver tolerance on the divergence (nats).

    Returns
    -------
    StatisticalStrength

    Examples
    --------
    CHSH correlations at Tsirelson's bound, uniform settings (van Dam, Gill & Grünwald 2005)::

    >>> import numpy as np
    >>> s = np.array([[1, 1], [1, -1]]); parity = np.array([[1, -1], [-1, 1]])
    >>> p = (1 + parity * (s / np.sqrt(2))[:, :, None, None]) / 4
    >>> round(statistical_strength(p).bits_per_trial, 7)
    0.0462738
    """
    projection = kl_projection(behaviour, setting_probabilities, tol=tol)
    if not np.isfinite(projection.divergence):
        raise StatsError("the KL projection did not find a local behaviour with finite divergence")
    return StatisticalStrength(
        nats_per_trial=projection.divergence,
        gap=max(projection.gap, 0.0),
        projection=projection,
    )
