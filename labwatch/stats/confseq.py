"""Confidence sequences: stopping-safe estimates of correlators and Bell values (i.i.d.).

A confidence sequence ``(C_t)`` covers the true mean at *all* times at once with probability at
least ``1 - alpha``, so it may be looked at after every batch and the run stopped whenever one
likes (Waudby-Smith & Ramdas, "Estimating means of bounded random variables by betting",
JRSS-B 86, 1 (2024), arXiv:2010.09686).  It assumes each trial of a setting pair is drawn
i.i.d. (more precisely: the same conditional mean given the past).  Against a local model with
memory, or with settings held in blocks, it says nothing about local realism: a local source can
fake any block-wise violation, and union-bounded per-setting sequences claim violations against
adaptive local sources almost always.  Use these as descriptive estimates; the test of local
realism is :mod:`labwatch.stats.supermartingale`.

Every variable here takes finitely many known values in ``[0, 1]`` (a trial's outcome cell
mapped through the Bell coefficients), so each update needs only the batch's counts.

Methods (option ``method``):

``"betting"`` (default)
    Hedged capital with a fixed grid of bets averaged (the "diversified Kelly" mixture of
    Waudby-Smith & Ramdas 2024): for a candidate mean ``m`` the capital
    ``K+(m) = mean_k prod_i (1 + c_k (X_i - m) / m)`` is a test martingale when the mean is
    ``m``; the lower bound is the smallest ``m`` with ``K+(m) < 1/alpha``, the upper bound
    likewise with ``K-(m) = mean_k prod_i (1 - c_k (X_i - m) / (1 - m))``.  Depends on the
    cumulative counts only: batch sizes and order do not matter, and ``alpha`` can be chosen at
    query time.
``"eb"``
    Predictable plug-in empirical Bernstein (their Eq. 13-15) with one bet ``lam_b`` and one
    centre ``mu_b`` per batch, both computed from earlier batches;
    ``lam_b = min(sqrt(2 ln(2/alpha) / (sigma2_(b-1) i ln(1 + i))), 1/2)`` at the index ``i``
    of the batch's first trial.  Tuned for the ``alpha`` given at construction; large early
    batches make it wide.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labwatch.bell import BellFunctional
from labwatch.stats._checks import StatsError, check_level, check_option

__all__ = [
    "CONFSEQ_METHODS",
    "BellSequenceResult",
    "BellValueSequence",
    "BoundedMeanSequence",
    "MeanSequenceSnapshot",
]

#: Allowed values of ``method``.
CONFSEQ_METHODS: tuple[str, ...] = ("betting", "eb")

#: Assumption labels of every confidence sequence here.
CONFSEQ_ASSUMPTIONS: tuple[str, ...] = (
    "i.i.d.",
    "stopping-safe",
    "cannot test local realism (block settings)",
)

_EB_CAP = 0.5
_BISECTIONS = 42


def _default_bets() -> NDArray[np.float64]:
    # bet fractions c_k of the largest safe bet, log-spaced: 1e-5 suits ~1e9 trials, 0.95 a few
    return np.logspace(-5.0, math.log10(0.95), 64)


@dataclass(frozen=True)
class MeanSequenceSnapshot:
    """Frozen state of confidence sequences for ``G`` bounded means; bounds at any level.

    Attributes
    ----------
    method : str
    support : ndarray, shape (G, S)
        Values in ``[0, 1]`` the variables take.
    counts : ndarray, shape (G, S)
        How often each value was seen.
    eb_sums : ndarray, shape (G, 3) or None
        ``eb`` only: ``sum lam X``, ``sum lam``, ``sum psi(lam) (X - mu)^2`` per stream.
    bets : ndarray, shape (K,)
        ``betting`` only: the bet fractions.
    """

    method: str
    support: NDArray[np.float64] = field(repr=False)
    counts: NDArray[np.float64] = field(repr=False)
    eb_sums: NDArray[np.float64] | None = field(repr=False, default=None)
    bets: NDArray[np.float64] = field(repr=False, default_factory=_default_bets)

    @property
    def trials(self) -> NDArray[np.int64]:
        """Trials per stream, shape (G,)."""
        return self.counts.sum(axis=1).astype(np.int64)

    @property
    def estimate(self) -> NDArray[np.float64]:
        """Sample means, shape (G,) (``nan`` without trials)."""
        n = self.counts.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(n > 0, (self.counts * self.support).sum(axis=1) / n, np.nan)

    def _log_capital(self, m: NDArray[np.float64], upper: bool) -> NDArray[np.float64]:
        # log mean_k prod_s (1 +- c_k (x_s - m) / scale)^n_s, shape (G,)
        x = self.support[:, None, :]
        c = self.bets[None, :, None]
        mm = m[:, None, None]
        if upper:  # bets on a mean above m
            factor = 1.0 + c * (x - mm) / mm
        else:
            factor = 1.0 - c * (x - mm) / (1.0 - mm)
        # every factor is at least 1 - c_k > 0, so zero counts contribute exactly 0
        terms = self.counts[:, None, :] * np.log(factor)
        per_bet = terms.sum(axis=2)
        top = per_bet.max(axis=1)
        return top + np.log(np.mean(np.exp(per_bet - top[:, None]), axis=1))

    def lower_bound(self, alpha: float) -> NDArray[np.float64]:
        """One-sided lower bound at level ``alpha`` (time-uniform), shape (G,)."""
        a = check_level("alpha", alpha)
        if self.method == "eb":
            return self._eb_bound(a, -1.0)
        threshold = math.log(1.0 / a)
        lo = np.zeros(self.support.shape[0])
        hi = np.ones(self.support.shape[0])
        for _ in range(_BISECTIONS):  # K+(m) decreases with m: reject m while K+ >= 1/alpha
            mid = 0.5 * (lo + hi)
            rejected = self._log_capital(np.clip(mid, 1e-300, 1.0), upper=True) >= threshold
            lo = np.where(rejected, mid, lo)
            hi = np.where(rejected, hi, mid)
        return lo

    def upper_bound(self, alpha: float) -> NDArray[np.float64]:
        """One-sided upper bound at level ``alpha`` (time-uniform), shape (G,)."""
        a = check_level("alpha", alpha)
        if self.method == "eb":
            return self._eb_bound(a, 1.0)
        threshold = math.log(1.0 / a)
        lo = np.zeros(self.support.shape[0])
        hi = np.ones(self.support.shape[0])
        for _ in range(_BISECTIONS):  # K-(m) increases with m
            mid = 0.5 * (lo + hi)
            rejected = self._log_capital(np.clip(mid, 0.0, 1.0 - 1e-16), upper=False) >= threshold
            hi = np.where(rejected, mid, hi)
            lo = np.where(rejected, lo, mid)
        return hi

    def interval(self, alpha: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Two-sided confidence sequence at level ``alpha`` (``alpha/2`` on each side)."""
        a = check_level("alpha", alpha)
        return self.lower_bound(a / 2), self.upper_bound(a / 2)

    def _eb_bound(self, alpha: float, side: float) -> NDArray[np.float64]:
        assert self.eb_sums is not None
        s_lx, s_l, s_v = self.eb_sums.T
        with np.errstate(invalid="ignore", divide="ignore"):
            bound = (s_lx + side * (math.log(1.0 / alpha) + s_v)) / s_l
        default = 1.0 if side > 0 else 0.0
        return np.clip(np.where(s_l > 0, bound, default), 0.0, 1.0)


class BoundedMeanSequence:
    """Confidence sequences for ``G`` means of variables with known finite support in [0, 1].

    Parameters
    ----------
    support : array_like, shape (G, S)
        Values (in ``[0, 1]``) the variable of each stream can take.
    method : {"betting", "eb"}
    alpha : float
        ``eb`` only: the level the bets are tuned for (bounds at other levels stay valid).
    """

    def __init__(self, support: ArrayLike, method: str = "betting", alpha: float = 0.05) -> None:
        sup = np.array(support, dtype=np.float64, copy=True)
        if sup.ndim != 2 or sup.size == 0:
            raise StatsError(f"support needs shape (G, S), got shape {sup.shape}")
        if not np.all(np.isfinite(sup)) or np.any(sup < 0) or np.any(sup > 1):
            raise StatsError(f"support values must lie in [0, 1], got {sup.tolist()!r}")
        self.method = check_option("method", method, CONFSEQ_METHODS)
        self.alpha = check_level("alpha", alpha)
        self.support = sup
        self.counts = np.zeros_like(sup)
        g = sup.shape[0]
        self._eb = np.zeros((g, 3))
        self._sum_x = np.zeros(g)
        self._sum_sq = np.zeros(g)

    def update(self, counts: ArrayLike) -> None:
        """Add one batch: ``counts[g, s]`` trials of stream ``g`` took value ``support[g, s]``."""
        n = np.asarray(counts, dtype=np.float64)
        if n.shape != self.support.shape:
            raise StatsError(f"counts have shape {n.shape}, support {self.support.shape}")
        if np.any(n < 0) or np.any(n != np.round(n)):
            raise StatsError("counts must be non-negative whole numbers")
        if self.method == "eb":
            self._update_eb(n)
        self.counts = self.counts + n

    def _update_eb(self, n: NDArray[np.float64]) -> None:
        t = self.counts.sum(axis=1)  # trials before this batch
        mu = (0.5 + self._sum_x) / (t + 1.0)
        sigma2 = (0.25 + self._sum_sq) / (t + 1.0)
        i = t + 1.0  # index of the batch's first trial
        lam = np.minimum(
            np.sqrt(2.0 * math.log(2.0 / self.alpha) / (sigma2 * i * np.log1p(i))), _EB_CAP
        )
        psi = -np.log1p(-lam) - lam  # = 4 psi_E(lam); times (X - mu)^2 below = v psi_E
        dev2 = (self.support - mu[:, None]) ** 2
        self._eb[:, 0] += lam * (n * self.support).sum(axis=1)
        self._eb[:, 1] += lam * n.sum(axis=1)
        self._eb[:, 2] += psi * (n * dev2).sum(axis=1)
        # tuning statistics (any predictable choice keeps validity)
        self._sum_x += (n * self.support).sum(axis=1)
        self._sum_sq += (n * dev2).sum(axis=1)

    def snapshot(self) -> MeanSequenceSnapshot:
        """Frozen copy of the state; its bounds can be taken at any level."""
        counts = self.counts.copy()
        counts.setflags(write=False)
        eb = self._eb.copy() if self.method == "eb" else None
        return MeanSequenceSnapshot(self.method, self.support, counts, eb)

    def lower_bound(self, alpha: float) -> NDArray[np.float64]:
        return self.snapshot().lower_bound(alpha)

    def upper_bound(self, alpha: float) -> NDArray[np.float64]:
        return self.snapshot().upper_bound(alpha)

    def interval(self, alpha: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        return self.snapshot().interval(alpha)


@dataclass(frozen=True)
class BellSequenceResult:
    """Stopping-safe estimate of a Bell value (and correlators) at one level.

    Attributes
    ----------
    estimate : float
        ``sum_xy sum_ab beta p_hat`` at the cumulative frequencies (``nan`` if a pair is empty).
    lower, upper : float
        Confidence-sequence bounds on the Bell value, each one-sided at ``alpha`` (union bound
        over setting pairs, ``alpha / (m_A m_B)`` per pair).
    alpha : float
    local_bound : float
    trials : int
    correlators : ndarray or None, shape (m_A, m_B, 3)
        Two-outcome scenarios: per pair ``(estimate, lower, upper)`` of ``E_xy``, each a
        two-sided sequence at ``alpha`` on its own (not simultaneous).
    assumptions : tuple of str
    """

    estimate: float
    lower: float
    upper: float
    alpha: float
    local_bound: float
    trials: int
    correlators: NDArray[np.float64] | None = field(repr=False)
    assumptions: tuple[str, ...]

    @property
    def lower_exceeds_local_bound(self) -> bool:
        """Whether the lower bound lies above the local bound (an estimate, not a test)."""
        return self.lower > self.local_bound


class BellValueSequence:
    """Confidence sequences for a Bell value from batch counts (block or event streams).

    Each setting pair's score ``beta[x, y, a, b]`` is rescaled to ``[0, 1]`` and tracked by a
    :class:`BoundedMeanSequence`; the Bell value bounds add the per-pair bounds at level
    ``alpha / (m_A m_B)`` (union bound).

    Parameters
    ----------
    functional : BellFunctional
    method : {"betting", "eb"}
    alpha : float
        ``eb`` only: tuning level.
    no_click_discarded : bool
        Adds the ``fair sampling`` label when the counts keep coincidences only.

    Examples
    --------
    >>> import numpy as np
    >>> from labwatch.bell import chsh
    >>> seq = BellValueSequence(chsh())
    >>> for x, y in [(0, 0), (0, 1), (1, 0), (1, 1)]:  # one setting pair per block
    ...     block = np.zeros((2, 2, 2, 2), dtype=int)
    ...     block[x, y] = [[80, 420], [425, 75]] if (x, y) == (1, 1) else [[420, 80], [75, 425]]
    ...     seq.update(block)
    >>> r = seq.result(0.05)
    >>> bool(r.lower < r.estimate < r.upper), round(r.estimate, 3)
    (True, 2.76)
    """

    def __init__(
        self,
        functional: BellFunctional,
        method: str = "betting",
        alpha: float = 0.05,
        *,
        no_click_discarded: bool = True,
    ) -> None:
        if not isinstance(functional, BellFunctional):
            raise StatsError(f"functional must be a BellFunctional, got {functional!r}")
        self.functional = functional
        beta = functional.coefficients
        m_a, m_b, d_a, d_b = beta.shape
        flat = beta.reshape(m_a * m_b, d_a * d_b)
        self._lo = flat.min(axis=1)
        self._span = flat.max(axis=1) - self._lo
        safe = np.where(self._span > 0, self._span, 1.0)
        self._values = BoundedMeanSequence(
            (flat - self._lo[:, None]) / safe[:, None], method, alpha
        )
        self._two_outcome = d_a == 2 and d_b == 2
        if self._two_outcome:
            same = np.array([1.0, 0.0, 0.0, 1.0])  # (1 + (-1)^(a+b)) / 2 over cells 00,01,10,11
            self._corr = BoundedMeanSequence(np.tile(same, (m_a * m_b, 1)), method, alpha)
        self.no_click_discarded = bool(no_click_discarded)

    def update(self, counts: ArrayLike) -> None:
        """Add one batch of counts ``N[x, y, a, b]`` (any mix of setting pairs)."""
        n = self.functional.scenario.check_counts(counts)
        flat = n.reshape(self._lo.size, -1)
        self._values.update(flat)
        if self._two_outcome:
            self._corr.update(flat)

    @property
    def assumptions(self) -> tuple[str, ...]:
        labels = CONFSEQ_ASSUMPTIONS
        if self.no_click_discarded:
            labels += ("fair sampling",)
        return labels

    def lower_bound(self, alpha: float) -> float:
        """Time-uniform lower bound on the Bell value at level ``alpha``."""
        a = check_level("alpha", alpha)
        per_pair = self._values.snapshot().lower_bound(a / self._lo.size)
        return float(np.sum(self._lo + self._span * per_pair))

    def upper_bound(self, alpha: float) -> float:
        """Time-uniform upper bound on the Bell value at level ``alpha``."""
        a = check_level("alpha", alpha)
        per_pair = self._values.snapshot().upper_bound(a / self._lo.size)
        return float(np.sum(self._lo + self._span * per_pair))

    def result(self, alpha: float) -> BellSequenceResult:
        """Frozen figures at level ``alpha``."""
        a = check_level("alpha", alpha)
        snap = self._values.snapshot()
        est_pair = snap.estimate
        estimate = float(np.sum(self._lo + self._span * est_pair))
        corr = None
        if self._two_outcome:
            cs = self._corr.snapshot()
            lo, hi = cs.interval(a)
            m_a, m_b = self.functional.coefficients.shape[:2]
            corr = np.stack([2 * cs.estimate - 1, 2 * lo - 1, 2 * hi - 1], axis=1)
            corr = corr.reshape(m_a, m_b, 3)
            corr.setflags(write=False)
        return BellSequenceResult(
            estimate=estimate,
            lower=self.lower_bound(a),
            upper=self.upper_bound(a),
            alpha=a,
            local_bound=self.functional.local_bound,
            trials=int(snap.trials.sum()),
            correlators=corr,
            assumptions=self.assumptions,
        )
