"""Fixed-n figures: Clopper-Pearson intervals and the common-practice "number of sigmas".

Both are valid only for a sample size fixed in advance and looked at once ("fixed n").  A live
monitor that keeps looking and stops when a figure looks good needs the stopping-safe figures of
:mod:`labwatch.stats.supermartingale` and :mod:`labwatch.stats.confseq` instead.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import betaincinv, ndtr

from labwatch.bell import FIXED_N_ASSUMPTIONS, BellFunctional
from labwatch.scenario import Scenario
from labwatch.stats._checks import StatsError

__all__ = [
    "ConfidenceInterval",
    "OutcomeIntervals",
    "SigmaFigure",
    "clopper_pearson",
    "clopper_pearson_array",
    "clopper_pearson_counts",
    "sigma_figure",
]


@dataclass(frozen=True)
class ConfidenceInterval:
    """A two-sided confidence interval for a probability.

    Attributes
    ----------
    low, high : float
        Interval end points, ``0 <= low <= high <= 1``.
    confidence_level : float
        Nominal coverage, e.g. 0.95.
    method : str
        How it was computed.
    assumptions : tuple of str
        What the coverage statement assumes.
    """

    low: float
    high: float
    confidence_level: float
    method: str = "clopper-pearson"
    assumptions: tuple[str, ...] = ("fixed n", "i.i.d.")

    def __str__(self) -> str:
        return (
            f"[{self.low:.6g}, {self.high:.6g}] ({100 * self.confidence_level:g}%, {self.method})"
        )


def _check_confidence(confidence_level: float) -> float:
    try:
        cl = float(confidence_level)
    except (TypeError, ValueError):
        raise StatsError(
            f"confidence_level must be a number in (0, 1), got {confidence_level!r}"
        ) from None
    if not 0.0 < cl < 1.0:
        raise StatsError(f"confidence_level must be in (0, 1), got {confidence_level!r}")
    return cl


def _as_whole(name: str, value: ArrayLike) -> NDArray[np.int64]:
    arr = np.asarray(value)
    if arr.dtype == bool:
        raise StatsError(f"{name} must be whole numbers, got booleans {value!r}")
    if arr.dtype.kind == "f":
        if not np.all(np.isfinite(arr)) or np.any(arr != np.round(arr)):
            raise StatsError(f"{name} must be whole numbers, got {value!r}")
    elif arr.dtype.kind not in "iu":
        raise StatsError(f"{name} must be whole numbers, got {value!r}")
    return arr.astype(np.int64)


def clopper_pearson_array(
    k: ArrayLike, n: ArrayLike, confidence_level: float = 0.95
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Vectorised Clopper-Pearson end points for broadcastable arrays ``k``, ``n``.

    Clopper & Pearson, Biometrika 26, 404 (1934): with ``alpha = 1 - confidence_level``,
    ``low = B^-1(alpha/2; k, n-k+1)`` (0 when ``k = 0``) and
    ``high = B^-1(1-alpha/2; k+1, n-k)`` (1 when ``k = n``), ``B^-1`` the Beta quantile.
    ``n = 0`` gives ``[0, 1]``.

    Returns
    -------
    low, high : ndarray
        Broadcast shape of ``k`` and ``n``.
    """
    cl = _check_confidence(confidence_level)
    kk = _as_whole("k", k)
    nn = _as_whole("n", n)
    kk, nn = np.broadcast_arrays(kk, nn)
    if np.any(nn < 0) or np.any(kk < 0) or np.any(kk > nn):
        raise StatsError(f"need 0 <= k <= n, got k={k!r}, n={n!r}")
    alpha = 1.0 - cl
    with np.errstate(invalid="ignore", divide="ignore"):
        low = np.where(
            kk > 0, betaincinv(np.maximum(kk, 1), np.maximum(nn - kk + 1, 1), alpha / 2), 0.0
        )
        high = np.where(kk < nn, betaincinv(kk + 1, np.maximum(nn - kk, 1), 1.0 - alpha / 2), 1.0)
    return np.asarray(low, dtype=np.float64), np.asarray(high, dtype=np.float64)


def clopper_pearson(k: int, n: int, confidence_level: float = 0.95) -> ConfidenceInterval:
    """Exact (Clopper-Pearson) confidence interval for a binomial proportion ``k / n``.

    Parameters
    ----------
    k : int
        Successes, ``0 <= k <= n``.
    n : int
        Trials (``n = 0`` gives ``[0, 1]``).
    confidence_level : float
        Two-sided coverage, in (0, 1).

    Returns
    -------
    ConfidenceInterval
        Labelled ``fixed n`` and ``i.i.d.``.

    Examples
    --------
    >>> ci = clopper_pearson(7, 20)
    >>> round(ci.low, 4), round(ci.high, 4)
    (0.1539, 0.5922)
    """
    if np.ndim(k) != 0 or np.ndim(n) != 0:
        raise StatsError(
            f"clopper_pearson takes scalars, got k={k!r}, n={n!r}; use clopper_pearson_array"
        )
    cl = _check_confidence(confidence_level)
    low, high = clopper_pearson_array(k, n, cl)
    return ConfidenceInterval(float(low), float(high), cl)


@dataclass(frozen=True)
class OutcomeIntervals:
    """Per-outcome Clopper-Pearson intervals of ``p(a,b|x,y)`` for every setting pair.

    Attributes
    ----------
    estimate : ndarray, shape (m_A, m_B, d_A, d_B)
        Frequencies ``N[x,y,a,b] / N_xy`` (``nan`` for a pair without trials).
    low, high : ndarray, shape (m_A, m_B, d_A, d_B)
        Interval end points for each outcome, each interval on its own (not simultaneous).
    trials : ndarray, shape (m_A, m_B)
        ``N_xy``.
    confidence_level : float
    assumptions : tuple of str
    """

    estimate: NDArray[np.float64] = field(repr=False)
    low: NDArray[np.float64] = field(repr=False)
    high: NDArray[np.float64] = field(repr=False)
    trials: NDArray[np.int64] = field(repr=False)
    confidence_level: float
    method: str = "clopper-pearson"
    assumptions: tuple[str, ...] = ("fixed n", "i.i.d.")


def clopper_pearson_counts(counts: ArrayLike, confidence_level: float = 0.95) -> OutcomeIntervals:
    """Clopper-Pearson interval of every outcome probability in a counts tensor.

    Parameters
    ----------
    counts : array_like, shape (m_A, m_B, d_A, d_B)
        ``N[x, y, a, b]``; each outcome is a binomial count out of ``N_xy = sum_ab N``.
    confidence_level : float
        Coverage of each interval separately.

    Returns
    -------
    OutcomeIntervals
    """
    n = Scenario.from_shape(np.shape(counts)).check_counts(counts)
    totals = n.sum(axis=(2, 3))
    low, high = clopper_pearson_array(n, totals[:, :, None, None], confidence_level)
    with np.errstate(invalid="ignore", divide="ignore"):
        est = np.where(totals[:, :, None, None] > 0, n / totals[:, :, None, None], np.nan)
    for arr in (est, low, high, totals):
        arr.setflags(write=False)
    return OutcomeIntervals(est, low, high, totals, _check_confidence(confidence_level))


@dataclass(frozen=True)
class SigmaFigure:
    """The common-practice figure ``(I - L) / sigma`` with its labels.

    ``sigma`` is the delta-method standard error of :meth:`BellFunctional.evaluate_counts`
    (per-setting multinomials; for CHSH ``var(E_xy) = (1 - E_xy^2) / N_xy``).  Common practice,
    no source.  It assumes a sample size fixed in advance, Gaussian errors and i.i.d. trials;
    looking repeatedly and stopping when it is large inflates its false-claim rate without
    bound (law of the iterated logarithm).

    Attributes
    ----------
    value : float
        Bell value ``I`` at the observed frequencies.
    stderr : float
        Delta-method standard error.
    local_bound : float
    sigmas : float
        ``(value - local_bound) / stderr`` (``nan`` when undefined).
    fixed_n_p_value : float
        One-sided Gaussian tail ``1 - Phi(sigmas)``, meaningful only at a fixed n.
    trials : int
    assumptions : tuple of str
    """

    value: float
    stderr: float
    local_bound: float
    sigmas: float
    fixed_n_p_value: float
    trials: int
    assumptions: tuple[str, ...] = FIXED_N_ASSUMPTIONS

    def __str__(self) -> str:
        return (
            f"{self.value:.4f} ± {self.stderr:.4f}: {self.sigmas:.2f} σ above {self.local_bound:g} "
            f"[{', '.join(self.assumptions)}]"
        )


def sigma_figure(functional: BellFunctional, counts: ArrayLike) -> SigmaFigure:
    """The labelled "number of standard deviations" figure for a counts tensor.

    Parameters
    ----------
    functional : BellFunctional
    counts : array_like, shape (m_A, m_B, d_A, d_B)

    Returns
    -------
    SigmaFigure
    """
    n = functional.scenario.check_counts(counts)
    bv = functional.evaluate_counts(n)
    sig = bv.margin_sigma
    p = float(ndtr(-sig)) if math.isfinite(sig) else math.nan
    return SigmaFigure(bv.value, bv.stderr, bv.local_bound, sig, p, int(n.sum()))
