"""Test factors for random-setting Bell tests and their validity check.

A *test factor* is a function ``F(x, y, a, b) >= 0`` of one trial.  It is valid against local
realism when, for every deterministic strategy pair ``(A, B)``,

    sum_xy q(x,y) F(x, y, A_x, B_y) <= 1                                              (*)

(Zhang, Glancy & Knill, PRA 88, 052119 (2013)).  Then ``E[F | past] <= 1`` for any local model,
even one with memory, as long as the settings of each trial are drawn from ``q`` afresh; products
of valid factors chosen from past data form a test supermartingale.

The linear factors ``T = 1 + lam (Z - L)`` with score ``Z = beta / q`` satisfy (*) because
``sum_xy q Z(A_x, B_y) = sum_xy beta(A_x, B_y) <= L``; they stay positive for
``0 <= lam < 1 / (L - Z_min)``.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labwatch.bell import BellFunctional
from labwatch.stats._checks import StatsError, check_setting_probabilities
from labwatch.strategies import maximize_over_strategies

__all__ = [
    "choose_functional",
    "kelly_growth",
    "lambda_max",
    "linear_factor",
    "max_local_expectation",
    "score_tensor",
]


def score_tensor(
    functional: BellFunctional, setting_probabilities: ArrayLike
) -> NDArray[np.float64]:
    """Per-trial score ``Z[x,y,a,b] = beta[x,y,a,b] / q(x,y)``, shape (m_A, m_B, d_A, d_B).

    For settings drawn from ``q``, ``E[Z] = I(p)``, the Bell value; ``E[Z] <= L`` for any local
    model.
    """
    q = check_setting_probabilities(setting_probabilities, functional.coefficients.shape[:2])
    return functional.coefficients / q[:, :, None, None]


def lambda_max(functional: BellFunctional, setting_probabilities: ArrayLike) -> float:
    """Largest bet ``1 / (L - Z_min)`` keeping ``1 + lam (Z - L) >= 0`` for every outcome.

    Raises
    ------
    StatsError
        When ``Z_min >= L`` (the functional cannot be violated: every score is at least the bound).
    """
    z = score_tensor(functional, setting_probabilities)
    spread = functional.local_bound - float(z.min())
    if not spread > 0:
        raise StatsError(
            f"functional {functional.name!r} has score minimum {float(z.min())!r} >= local bound "
            f"{functional.local_bound!r}; nothing to bet on"
        )
    return 1.0 / spread


def linear_factor(
    functional: BellFunctional, setting_probabilities: ArrayLike, lam: float
) -> NDArray[np.float64]:
    """The linear test factor ``T = 1 + lam (Z - L)``, shape (m_A, m_B, d_A, d_B)."""
    lmax = lambda_max(functional, setting_probabilities)
    if not 0.0 <= lam <= lmax:
        raise StatsError(f"bet lam must be in [0, {lmax!r}], got {lam!r}")
    z = score_tensor(functional, setting_probabilities)
    return 1.0 + lam * (z - functional.local_bound)


def max_local_expectation(factor: ArrayLike, setting_probabilities: ArrayLike) -> float:
    """``max over deterministic (A, B) of sum_xy q(x,y) F(x, y, A_x, B_y)`` (exact).

    A factor is valid against local realism when this is at most 1 (see module docstring).
    Exhaustive over strategies via :func:`labwatch.strategies.maximize_over_strategies`.
    """
    f = np.asarray(factor, dtype=np.float64)
    if f.ndim != 4:
        raise StatsError(f"a test factor has 4 axes [x, y, a, b], got shape {f.shape}")
    if np.any(f < 0) or not np.all(np.isfinite(f)):
        raise StatsError("a test factor must be finite and non-negative")
    q = check_setting_probabilities(setting_probabilities, f.shape[:2], strictly_positive=False)
    return maximize_over_strategies(q[:, :, None, None] * f).value


def kelly_growth(
    functional: BellFunctional,
    setting_probabilities: ArrayLike,
    counts: ArrayLike,
    max_fraction: float = 0.9,
) -> tuple[float, float]:
    """Best linear bet on past random-setting counts and its empirical growth.

    Maximises ``G(lam) = sum_c p_hat(c) ln(1 + lam (Z(c) - L))`` over
    ``0 <= lam <= max_fraction / (L - Z_min)``, ``p_hat`` the joint frequencies of
    ``counts[x, y, a, b]``.

    Returns
    -------
    lam, growth : float
        The bet and ``G(lam)`` in nats per trial (0, 0 when nothing is worth betting).
    """
    n = functional.scenario.check_counts(counts).ravel().astype(np.float64)
    total = n.sum()
    if total == 0:
        return 0.0, 0.0
    p_hat = n / total
    excess = (score_tensor(functional, setting_probabilities) - functional.local_bound).ravel()
    cap = max_fraction * lambda_max(functional, setting_probabilities)
    if p_hat @ excess <= 0:
        return 0.0, 0.0
    lo, hi = 0.0, cap
    for _ in range(60):  # the slope of the concave growth decreases in lam
        mid = 0.5 * (lo + hi)
        if p_hat @ (excess / (1.0 + mid * excess)) > 0:
            lo = mid
        else:
            hi = mid
    return lo, float(p_hat @ np.log1p(lo * excess))


def choose_functional(
    candidates: Sequence[BellFunctional],
    setting_probabilities: ArrayLike,
    counts: ArrayLike,
) -> BellFunctional:
    """The candidate with the largest empirical Kelly growth on ``counts``.

    Feed it past counts only and hand the result to ``LocalRealismTest.update_functional``
    before the next batch: the choice is then predictable and the test stays valid.  Useful
    when the sign conventions of a setup are not known (e.g. the eight CHSH facets).
    """
    if not candidates:
        raise StatsError("choose_functional needs at least one candidate")
    growths = [kelly_growth(f, setting_probabilities, counts)[1] for f in candidates]
    return candidates[int(np.argmax(growths))]
