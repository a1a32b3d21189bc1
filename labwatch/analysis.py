"""Figures computed from accumulated counts at each analysis epoch (pure core).

:class:`Analyzer` holds what must persist between epochs of a run (warm LP models, running
test martingales) and turns a :class:`~labwatch.accumulate.RunAccumulator` into figures.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from labwatch.accumulate import RunAccumulator
from labwatch.bell import BellFunctional, BellValue, cglmp, chsh
from labwatch.scenario import Scenario
from labwatch.snapshot import Figure, RateFigures

__all__ = [
    "FUNCTIONAL_CHOICES",
    "AnalysisConfig",
    "EpochFigures",
    "Analyzer",
    "correlators",
    "correlation_contrast",
    "default_functional",
]

#: Named functional choices accepted by :class:`AnalysisConfig` (or pass a BellFunctional).
FUNCTIONAL_CHOICES = ("auto", "chsh", "cglmp", "certificate")


def default_functional(scenario: Scenario) -> BellFunctional | None:
    """CHSH for 2 settings x 2 outcomes, CGLMP for 2 settings x d outcomes, else None."""
    m_a, m_b, d_a, d_b = scenario.shape
    if (m_a, m_b) != (2, 2) or d_a != d_b:
        return None
    return chsh() if d_a == 2 else cglmp(d_a)


def correlators(
    counts: NDArray[np.int64],
) -> tuple[NDArray[np.float64], NDArray[np.float64]] | None:
    """``E_xy = (N_same - N_diff) / N_xy`` and ``sqrt((1 - E^2)/N_xy)`` for two outcomes.

    Outcome 0 is +1 and outcome 1 is -1.  Setting pairs without trials give ``nan``.
    Returns None unless both parties have two outcomes.
    """
    if counts.shape[2:] != (2, 2):
        return None
    n = counts.sum(axis=(2, 3)).astype(float)
    same = counts[:, :, 0, 0] + counts[:, :, 1, 1]
    diff = counts[:, :, 0, 1] + counts[:, :, 1, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        e = np.where(n > 0, (same - diff) / n, np.nan)
        err = np.where(n > 0, np.sqrt(np.maximum(1 - e**2, 0) / n), np.nan)
    return e, err


def correlation_contrast(counts: NDArray[np.int64]) -> NDArray[np.float64]:
    """Per setting pair: ``(P_k - 1/d) / (1 - 1/d)``, ``P_k = max_k P(b = a + k mod d)``.

    1 for perfectly correlated outcomes (up to a relabelling shift), 0 for uniform noise; for
    qubits it is the fringe visibility ``|E|`` of the better of the two labellings.  Uses
    ``d = min(d_A, d_B)`` and only outcomes below it.
    """
    d = min(counts.shape[2], counts.shape[3])
    sub = counts[:, :, :d, :d].astype(float)
    n = sub.sum(axis=(2, 3))
    a = np.arange(d)
    shifted = np.stack([sub[:, :, a, (a + k) % d].sum(axis=2) for k in range(d)], axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        best = np.where(n > 0, shifted.max(axis=-1) / n, np.nan)
    return (best - 1.0 / d) / (1.0 - 1.0 / d)


@dataclass(frozen=True)
class AnalysisConfig:
    """What the analyzer computes.

    Attributes
    ----------
    functional : str or BellFunctional
        One of :data:`FUNCTIONAL_CHOICES` or a user tensor.  ``"auto"`` picks CHSH/CGLMP when
        the scenario has two settings per party, else the polytope certificate.
    visibility : bool
        Solve the local-polytope LP (white-noise visibility) at each epoch.
    bootstrap : int
        Parametric-bootstrap resamples for the visibility (0: delta method only).
    best_pair : bool
        Search all 2x2 sub-scenarios when a party has more than two settings.
    confidence_level : float
        Level of the reported intervals.
    lp_vertex_cap : int
        Scenarios with more local vertices than this skip the LP at the display rate.
    seed : int
        Seed of the bootstrap resampling (so replays reproduce the live figures).
    target : str or None
        Confidence target (see :mod:`labwatch.stats.target`), e.g. ``"p<=1e-6"``.
    """

    functional: str | BellFunctional = "auto"
    visibility: bool = True
    bootstrap: int = 0
    best_pair: bool = True
    confidence_level: float = 0.95
    lp_vertex_cap: int = 10**9
    seed: int = 0
    target: str | None = None

    def __post_init__(self) -> None:
        if isinstance(self.functional, str) and self.functional not in FUNCTIONAL_CHOICES:
            raise ValueError(f"functional {self.functional!r} not in {FUNCTIONAL_CHOICES}")
        if not 0 < self.confidence_level < 1:
            raise ValueError(f"confidence_level must be in (0, 1), got {self.confidence_level}")


@dataclass(frozen=True)
class EpochFigures:
    """What :meth:`Analyzer.analyze` returns for one epoch."""

    functional: str
    bell: BellValue | None
    bell_window: BellValue | None
    correlators: NDArray[np.float64] | None
    correlator_errors: NDArray[np.float64] | None
    contrast: NDArray[np.float64]
    rates: RateFigures
    figures: tuple[Figure, ...]
    extras: dict[str, Any]


class Analyzer:
    """Per-run analysis state; one instance per run (a new run gets a fresh analyzer)."""

    def __init__(self, scenario: Scenario, config: AnalysisConfig | None = None) -> None:
        self.scenario = scenario
        self.config = config or AnalysisConfig()
        self._functional = self._resolve_functional()

    def _resolve_functional(self) -> BellFunctional | None:
        f = self.config.functional
        if isinstance(f, BellFunctional):
            return f if f.coefficients.shape == self.scenario.shape else None
        if f == "chsh":
            return chsh() if self.scenario.shape == (2, 2, 2, 2) else None
        if f == "cglmp":
            m_a, m_b, d_a, d_b = self.scenario.shape
            return cglmp(d_a) if (m_a, m_b) == (2, 2) and d_a == d_b else None
        if f == "auto":
            return default_functional(self.scenario)
        return None  # "certificate": taken from the LP when it runs

    @property
    def functional(self) -> BellFunctional | None:
        """The functional currently used for the Bell value (may change to the certificate)."""
        return self._functional

    def rates(self, acc: RunAccumulator) -> RateFigures:
        """Coincidence and singles rates over the rolling window, heralding and accidentals."""
        live = acc.window.live_time_s
        trials = int(acc.window.total.sum())
        if live <= 0:
            return RateFigures(math.nan, math.nan, None, None, None, None, None)
        rate = trials / live
        rate_err = math.sqrt(trials) / live
        if not acc.has_singles:
            return RateFigures(rate, rate_err, None, None, None, None, None)
        s_a, s_b = acc.window.singles_total
        ra, rb = s_a / live, s_b / live
        acc_hz = ra * rb * acc.coincidence_window_s if acc.coincidence_window_s else None
        her_a = trials / s_b if s_b > 0 else None
        her_b = trials / s_a if s_a > 0 else None
        return RateFigures(rate, rate_err, ra, rb, acc_hz, her_a, her_b)

    def analyze(self, acc: RunAccumulator, epoch_counts: NDArray[np.int64]) -> EpochFigures:
        """Figures for the run so far; ``epoch_counts`` are the counts added since last epoch."""
        f = self._functional
        bell = f.evaluate_counts(acc.counts) if f is not None else None
        bell_w = f.evaluate_counts(acc.window.total) if f is not None else None
        corr = correlators(acc.counts)
        return EpochFigures(
            functional=f.name if f is not None else "",
            bell=bell,
            bell_window=bell_w,
            correlators=None if corr is None else corr[0],
            correlator_errors=None if corr is None else corr[1],
            contrast=correlation_contrast(acc.counts),
            rates=self.rates(acc),
            figures=(),
            extras={},
        )
