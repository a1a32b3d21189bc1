"""Linear Bell functionals: coefficient tensors with exact local bounds.

A functional is ``I(p) = sum_{x,y,a,b} beta[x, y, a, b] p(a, b | x, y)`` with ``beta`` of shape
``(m_A, m_B, d_A, d_B)``.  Larger is "more nonlocal": the local bound is the maximum of ``I``
over deterministic strategies, computed exactly (:mod:`labwatch.strategies`).

Outcome labels for two-outcome measurements: outcome 0 is the "+1" result, outcome 1 is "-1".
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labwatch.scenario import Scenario
from labwatch.strategies import StrategyOptimum, maximize_over_strategies

__all__ = [
    "BellFunctional",
    "BellValue",
    "FIXED_N_ASSUMPTIONS",
    "ch_eberhard",
    "cglmp",
    "chsh",
    "chsh_relabelings",
    "correlator_coefficients",
]

#: Assumption labels of the common-practice (delta-method) standard error.
FIXED_N_ASSUMPTIONS: tuple[str, ...] = ("fixed n", "Gaussian", "i.i.d.")


@dataclass(frozen=True)
class BellValue:
    """A Bell value estimated from data.

    Attributes
    ----------
    value : float
        ``I`` evaluated at the observed frequencies (dimensionless).
    stderr : float
        Delta-method standard error from per-setting-pair multinomials; ``nan`` when the
        input were probabilities without sample sizes, or a setting pair has no trials.
    local_bound : float
        Exact maximum over local deterministic strategies.
    trials_per_setting : tuple of int, or None
        Trials ``N_xy`` behind each setting pair, row-major over ``(x, y)``.
    assumptions : tuple of str
        What ``stderr`` assumes.
    """

    value: float
    stderr: float
    local_bound: float
    trials_per_setting: tuple[int, ...] | None = None
    assumptions: tuple[str, ...] = FIXED_N_ASSUMPTIONS

    @property
    def margin_sigma(self) -> float:
        """``(value - local_bound) / stderr``: the common-practice "number of sigmas" (fixed n)."""
        if not (self.stderr > 0):
            return math.nan
        return (self.value - self.local_bound) / self.stderr

    def __str__(self) -> str:
        return f"{self.value:.4f} ± {self.stderr:.4f} (local bound {self.local_bound:g})"


@dataclass(frozen=True, eq=False)
class BellFunctional:
    """A linear Bell functional given by its coefficient tensor.

    Parameters
    ----------
    coefficients : array_like, shape (m_A, m_B, d_A, d_B)
        ``beta[x, y, a, b]``; copied and made read-only.
    name : str
        Short label shown in views.
    quantum_bound : float or None
        Known maximum over quantum correlations (``None`` when unknown).
    no_signalling_bound : float or None
        Known maximum over no-signalling correlations (``None`` when unknown).

    Examples
    --------
    >>> f = chsh()
    >>> f.local_bound
    2.0
    """

    coefficients: NDArray[np.float64]
    name: str = "custom"
    quantum_bound: float | None = None
    no_signalling_bound: float | None = None
    description: str = field(default="", repr=False)

    def __post_init__(self) -> None:
        coeffs = np.array(self.coefficients, dtype=np.float64, copy=True)
        Scenario.from_shape(coeffs.shape)  # validates the shape
        if not np.all(np.isfinite(coeffs)):
            raise ValueError("Bell coefficients must be finite")
        coeffs.setflags(write=False)
        object.__setattr__(self, "coefficients", coeffs)

    @property
    def scenario(self) -> Scenario:
        """The scenario the coefficient tensor belongs to."""
        return Scenario.from_shape(self.coefficients.shape)

    @cached_property
    def local_optimum(self) -> StrategyOptimum:
        """The maximising deterministic strategy pair (exact enumeration)."""
        return maximize_over_strategies(self.coefficients)

    @property
    def local_bound(self) -> float:
        """Exact maximum over local deterministic strategies."""
        return self.local_optimum.value

    @cached_property
    def local_minimum(self) -> float:
        """Exact minimum over local deterministic strategies."""
        return -maximize_over_strategies(-self.coefficients).value

    def evaluate(self, probabilities: ArrayLike, trials: ArrayLike | None = None) -> BellValue:
        """Value of the functional at a probability tensor.

        Parameters
        ----------
        probabilities : array_like, shape (m_A, m_B, d_A, d_B)
        trials : array_like, shape (m_A, m_B), optional
            Trials behind each setting pair; when given, the delta-method standard error
            ``sqrt(sum_xy [sum_ab beta^2 p - (sum_ab beta p)^2] / N_xy)`` is reported.
        """
        p = np.asarray(probabilities, dtype=np.float64)
        if p.shape != self.coefficients.shape:
            raise ValueError(
                f"probabilities have shape {p.shape}, functional needs {self.coefficients.shape}"
            )
        value = float(np.sum(self.coefficients * p))
        if trials is None:
            return BellValue(value, math.nan, self.local_bound)
        n = np.asarray(trials, dtype=np.float64)
        first = np.sum(self.coefficients * p, axis=(2, 3))
        second = np.sum(self.coefficients**2 * p, axis=(2, 3))
        with np.errstate(divide="ignore", invalid="ignore"):
            var = np.where(n > 0, np.maximum(second - first**2, 0.0) / n, np.nan)
        stderr = float(np.sqrt(np.sum(var)))
        return BellValue(
            value,
            stderr,
            self.local_bound,
            tuple(int(v) for v in n.ravel()),
        )

    def evaluate_counts(self, counts: ArrayLike) -> BellValue:
        """Value and delta-method standard error from a counts tensor ``N[x, y, a, b]``.

        Frequencies are ``N[x,y,a,b] / N_xy`` per setting pair.  A setting pair without trials
        makes the value and its error ``nan``.
        """
        n = self.scenario.check_counts(counts)
        totals = n.sum(axis=(2, 3))
        if np.any(totals == 0):
            return BellValue(
                math.nan, math.nan, self.local_bound, tuple(int(v) for v in totals.ravel())
            )
        p = n / totals[:, :, None, None]
        return self.evaluate(p, totals)

    def normalized(self) -> BellFunctional:
        """The same inequality scaled by ``1/|local_bound|`` (unchanged when the bound is 0).

        ``I <= L`` keeps its meaning; a nonzero bound becomes +-1.
        """
        scale = abs(self.local_bound) or 1.0
        return BellFunctional(
            self.coefficients / scale, name=self.name, description=self.description
        )

    def __repr__(self) -> str:
        return f"BellFunctional(name={self.name!r}, scenario={self.scenario})"


def correlator_coefficients(signs: ArrayLike) -> NDArray[np.float64]:
    """Coefficients of ``sum_xy s_xy E_xy`` for two-outcome measurements.

    ``E_xy = sum_ab (-1)**(a+b) p(a,b|x,y)``, outcome 0 meaning +1.  ``signs`` has shape
    ``(m_A, m_B)``.
    """
    s = np.asarray(signs, dtype=np.float64)
    parity = np.array([[1.0, -1.0], [-1.0, 1.0]])
    return s[:, :, None, None] * parity[None, None, :, :]


def chsh(minus: tuple[int, int] = (1, 1), sign: int = 1) -> BellFunctional:
    """The CHSH functional ``S = sign * (E00 + E01 + E10 + E11 - 2 E_minus)``.

    Parameters
    ----------
    minus : (x, y)
        The setting pair whose correlator enters with a minus sign (default ``(1, 1)``:
        ``S = E00 + E01 + E10 - E11``).
    sign : +1 or -1
        Overall sign; the eight choices of ``minus`` and ``sign`` are the CHSH facets.

    Local bound 2, Tsirelson bound 2√2 (Cirel'son, Lett. Math. Phys. 4, 93 (1980)),
    no-signalling bound 4.
    """
    if sign not in (1, -1):
        raise ValueError(f"sign must be +1 or -1, got {sign!r}")
    if tuple(minus) not in ((0, 0), (0, 1), (1, 0), (1, 1)):
        raise ValueError(f"minus must be one of (0,0), (0,1), (1,0), (1,1), got {minus!r}")
    signs = np.ones((2, 2))
    signs[minus] = -1.0
    name = (
        "CHSH"
        if (tuple(minus), sign) == ((1, 1), 1)
        else f"CHSH[-E{minus[0]}{minus[1]},{'+' if sign > 0 else '-'}]"
    )
    return BellFunctional(
        sign * correlator_coefficients(signs),
        name=name,
        quantum_bound=2.0 * math.sqrt(2.0),
        no_signalling_bound=4.0,
        description="S = Σ s_xy E_xy; local bound 2, Tsirelson 2√2",
    )


def chsh_relabelings() -> list[BellFunctional]:
    """All eight CHSH facets (choice of the minus-signed pair and of the overall sign)."""
    return [chsh(m, s) for s in (1, -1) for m in ((0, 0), (0, 1), (1, 0), (1, 1))]


def cglmp(d: int) -> BellFunctional:
    """The CGLMP functional ``I_d`` for two settings and ``d`` outcomes per party.

    Collins, Gisin, Linden, Massar & Popescu, PRL 88, 040404 (2002), Eq. (4) as we read it,
    with settings A1, A2 -> x = 0, 1 and B1, B2 -> y = 0, 1::

        I_d = sum_{k=0}^{floor(d/2)-1} (1 - 2k/(d-1)) (
              [P(A1 = B1 + k) + P(B1 = A2 + k + 1) + P(A2 = B2 + k) + P(B2 = A1 + k)]
            - [P(A1 = B1 - k - 1) + P(B1 = A2 - k) + P(A2 = B2 - k - 1) + P(B2 = A1 - k - 1)])

    with equalities mod ``d``.  Local bound 2 for every ``d``; for ``d = 2`` it is CHSH.
    """
    if isinstance(d, bool) or not isinstance(d, (int, np.integer)) or d < 2:
        raise ValueError(f"CGLMP needs an integer d >= 2, got {d!r}")
    d = int(d)
    a = np.arange(d)[:, None]
    b = np.arange(d)[None, :]
    diff = (a - b) % d  # a - b mod d

    def eq(k: int, reverse: bool) -> NDArray[np.float64]:
        # indicator of a - b == k (or b - a == k when reverse) mod d
        return ((((-diff) % d) if reverse else diff) == (k % d)).astype(np.float64)

    beta = np.zeros((2, 2, d, d))
    for k in range(d // 2):
        c = 1.0 - 2.0 * k / (d - 1)
        beta[0, 0] += c * (eq(k, False) - eq(-k - 1, False))  # A1 vs B1
        beta[1, 0] += c * (eq(k + 1, True) - eq(-k, True))  # B1 vs A2
        beta[1, 1] += c * (eq(k, False) - eq(-k - 1, False))  # A2 vs B2
        beta[0, 1] += c * (eq(k, True) - eq(-k - 1, True))  # B2 vs A1
    return BellFunctional(
        beta,
        name=f"CGLMP{d}",
        quantum_bound=2.0 * math.sqrt(2.0) if d == 2 else None,
        no_signalling_bound=4.0,
        description=f"CGLMP I_{d}; local bound 2",
    )


def ch_eberhard(
    outcomes_a: int = 2, outcomes_b: int = 2, detect_a: int = 0, detect_b: int = 0
) -> BellFunctional:
    """The Clauser-Horne functional with the no-click events kept (Eberhard's form).

    ``CH = P(++|00) + P(++|01) + P(++|10) - P(++|11) - P_A(+|0) - P_B(+|0) <= 0``

    where ``+`` is the outcome index ``detect_a`` (``detect_b``) -- "the chosen detector
    clicked" -- and every other outcome, including no-click, counts as "not +".  Clauser &
    Horne, PRD 10, 526 (1974); Eberhard, PRA 47, R747 (1993).  The marginals are read from
    setting pair (0, 0) (no-signalling makes the choice immaterial for physical data).
    Local bound 0; a positive value needs no fair-sampling assumption.
    """
    beta = np.zeros((2, 2, outcomes_a, outcomes_b))
    for x, y, s in ((0, 0, 1.0), (0, 1, 1.0), (1, 0, 1.0), (1, 1, -1.0)):
        beta[x, y, detect_a, detect_b] += s
    beta[0, 0, detect_a, :] -= 1.0
    beta[0, 0, :, detect_b] -= 1.0
    return BellFunctional(
        beta,
        name="CH",
        quantum_bound=(math.sqrt(2.0) - 1.0) / 2.0,
        no_signalling_bound=0.5,
        description="Clauser-Horne/Eberhard, no-click kept; local bound 0",
    )
