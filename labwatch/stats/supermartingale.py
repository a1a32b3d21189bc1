"""Stopping-safe test of local realism for random-setting streams (test supermartingale).

Each batch of trials arrives as a counts tensor ``N[x, y, a, b]``; settings of every trial were
drawn independently from a known ``q(x, y)``.  The running evidence is

    M_t = prod over batches b  prod over cells c  F_b(c) ** N_b(c)

with a test factor ``F_b`` fixed from *earlier* batches only (predictable) and valid against
local realism (:mod:`labwatch.stats.factors`).  Under any local model, with memory or not,
``M`` is a test supermartingale, so by Ville's inequality ``P(sup_t M_t >= 1/alpha) <= alpha``
and ``p_t = min(1, 1 / max_{s<=t} M_s)`` is a p-value at any data-dependent stopping time
(Zhang, Glancy & Knill, PRA 84, 062118 (2011); Shafer, Shen, Vereshchagin & Vovk,
Statist. Sci. 26, 84 (2011)).

Betting methods (option ``method``):

``"grid"``
    Average of the linear-factor supermartingales ``prod (1 + lam_k (Z - L))`` over a fixed grid
    of bets ``lam_k`` (an average of test supermartingales is one).  The average depends on the
    batch counts only, so batch sizes do not matter; asymptotically it grows like the best bet.
``"kelly"``
    One bet ``lam_b`` per batch maximising the empirical log-growth
    ``sum_c p_hat(c) ln(1 + lam (Z(c) - L))`` over the past trials (plug-in Kelly), shrunk by
    ``prior_trials`` pseudo-trials of a local point at the bound.
``"pbr"``
    Prediction-based ratio ``R = p_hat / p_LR`` with ``p_LR`` the KL projection of the smoothed
    past frequencies onto the local polytope (Zhang, Glancy & Knill 2011, 2013); rescaled if
    needed so that the validity condition holds exactly, checked by exhaustive maximisation over
    deterministic strategies at every batch.  Needs no functional (the functional is reported).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labwatch.bell import BellFunctional
from labwatch.scenario import Scenario
from labwatch.stats._checks import StatsError, check_option, check_setting_probabilities
from labwatch.stats.factors import max_local_expectation
from labwatch.stats.forecast import TimeToTarget, forecast_time_to_target
from labwatch.stats.pbr import PBRFactors
from labwatch.strategies import vertex_tensor

__all__ = [
    "BETTING_METHODS",
    "LocalRealismEnsemble",
    "LocalRealismResult",
    "LocalRealismTest",
    "default_bet_grid",
]

#: Allowed values of ``method``.
BETTING_METHODS: tuple[str, ...] = ("grid", "kelly", "pbr")

_LN10 = math.log(10.0)


def _logsumexp(a: NDArray[np.float64], axis: int) -> NDArray[np.float64]:
    top = np.max(a, axis=axis, keepdims=True)
    return np.squeeze(top, axis=axis) + np.log(np.sum(np.exp(a - top), axis=axis))


def default_bet_grid(size: int = 128) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Default bet fractions ``f_k`` (of the largest safe bet) and their prior weights.

    Half of the prior mass sits on ``size // 2`` evenly spaced fractions in (0, 1], half on
    ``size // 2`` log-spaced fractions in [1e-4, 1] (small violations need small bets).

    Returns
    -------
    fractions, weights : ndarray, shape (size,)
    """
    if size < 4:
        raise StatsError(f"bet grid size must be at least 4, got {size!r}")
    half = size // 2
    lin = np.arange(1, half + 1) / half
    log = np.logspace(-4.0, 0.0, size - half)
    fractions = np.concatenate([lin, log])
    weights = np.concatenate([np.full(half, 0.5 / half), np.full(size - half, 0.5 / (size - half))])
    return fractions, weights


@dataclass(frozen=True)
class LocalRealismResult:
    """Frozen snapshot of a stopping-safe test of local realism.

    Attributes
    ----------
    p_value : float
        ``min(1, 1 / max_s M_s)``: valid at any stopping time, with memory in the devices.
    log_m : float
        ``ln M`` after the last batch (natural log).
    log_m_max : float
        ``ln max_s M_s`` over batch ends (``>= 0``, ``M_0 = 1``).
    log10_evidence : float
        ``log10(1 / p_value)``.
    trials : int
        Trials tested so far.
    batches : int
        Batches tested so far.
    method : str
        Betting method (one of :data:`BETTING_METHODS`).
    functional : str
        Name of the functional bet on for the next batch.
    local_bound : float
        Its local bound.
    bet : float
        Bet ``lam`` for the next batch (``kelly``), its posterior mean (``grid``), or ``nan``
        (``pbr``).
    growth_per_trial : float
        Plug-in estimate of ``E[ln F]`` per trial for the next batch (nats/trial), from the past
        frequencies.
    realised_growth_per_trial : float
        ``ln M / trials`` so far (nats/trial).
    factor_bound : float
        ``max over deterministic strategies of sum_xy q F`` for the next trial's factor
        (``<= 1`` for a valid factor; checked exhaustively).
    assumptions : tuple of str
    """

    p_value: float
    log_m: float
    log_m_max: float
    log10_evidence: float
    trials: int
    batches: int
    method: str
    functional: str
    local_bound: float
    bet: float
    growth_per_trial: float
    realised_growth_per_trial: float
    factor_bound: float
    assumptions: tuple[str, ...]

    def __str__(self) -> str:
        return (
            f"p <= {self.p_value:.3g} after {self.trials} trials ({self.method}; "
            f"{', '.join(self.assumptions)})"
        )


class LocalRealismEnsemble:
    """Many independent streams tested at once (vectorised); the engine of :class:`LocalRealismTest`.

    Parameters
    ----------
    functional : BellFunctional
        Inequality ``I <= L`` to bet on (``grid``, ``kelly``); reported only for ``pbr``.
    setting_probabilities : array_like, shape (m_A, m_B)
        ``q(x, y) > 0``, the distribution every trial's settings are drawn from.
    runs : int
        Number of independent streams.
    method : {"grid", "kelly", "pbr"}
    max_fraction : float
        Bets are at most ``max_fraction / (L - Z_min)``; each linear factor is then at least
        ``1 - max_fraction`` (``grid``, ``kelly``).
    grid : (fractions, weights), optional
        Bet fractions in (0, 1] and prior weights for ``grid``; :func:`default_bet_grid` if omitted.
    prior_trials : float
        ``kelly``: pseudo-trials of the optimal local strategy (a point at the bound) added to
        the past frequencies, which shrinks early bets towards 0; ``pbr``: pseudo-trials per setting pair spread uniformly over outcomes.
    min_trials : int
        ``kelly``/``pbr`` bet nothing (factor 1) before this many past trials.
    no_click_discarded : bool
        The counts keep only coincidences (a no-click outcome is dropped): adds the
        ``fair sampling`` label.
    check_factors : bool
        Verify the validity condition of the linear factors (``grid``, ``kelly``) by exhaustive
        maximisation over deterministic strategies at every batch (one maximisation per stream;
        ``pbr`` factors are always checked and fixed up).  Otherwise the analytic value 1 is
        reported.
    """

    def __init__(
        self,
        functional: BellFunctional,
        setting_probabilities: ArrayLike,
        runs: int,
        method: str = "grid",
        *,
        max_fraction: float = 0.9,
        grid: tuple[ArrayLike, ArrayLike] | None = None,
        prior_trials: float | None = None,
        min_trials: int = 0,
        no_click_discarded: bool = True,
        check_factors: bool = False,
    ) -> None:
        if not isinstance(functional, BellFunctional):
            raise StatsError(f"functional must be a BellFunctional, got {functional!r}")
        self.method = check_option("method", method, BETTING_METHODS)
        if isinstance(runs, bool) or not isinstance(runs, (int, np.integer)) or runs < 1:
            raise StatsError(f"runs must be a positive integer, got {runs!r}")
        if not 0.0 < max_fraction < 1.0:
            raise StatsError(f"max_fraction must be in (0, 1), got {max_fraction!r}")
        if isinstance(min_trials, bool) or not isinstance(min_trials, (int, np.integer)):
            raise StatsError(f"min_trials must be an integer, got {min_trials!r}")
        self.runs = int(runs)
        self.scenario: Scenario = functional.scenario
        shape = self.scenario.shape
        self.q = check_setting_probabilities(setting_probabilities, shape[:2])
        self.max_fraction = float(max_fraction)
        self.min_trials = int(min_trials)
        if prior_trials is None:
            prior_trials = {"grid": 0.0, "kelly": 30.0, "pbr": 4.0}[self.method]
        if not prior_trials >= 0:
            raise StatsError(f"prior_trials must be >= 0, got {prior_trials!r}")
        self.prior_trials = float(prior_trials)
        self.no_click_discarded = bool(no_click_discarded)
        self.check_factors = bool(check_factors)
        n_cells = self.scenario.size
        self._past = np.zeros((self.runs, n_cells))
        self.trials = np.zeros(self.runs, dtype=np.int64)
        self.log_m = np.zeros(self.runs)
        self.log_m_max = np.zeros(self.runs)
        self.batches = 0
        self.history_trials: list[NDArray[np.int64]] = []
        self.history_log_m: list[NDArray[np.float64]] = []
        if grid is None:
            fractions, weights = default_bet_grid()
        else:
            fractions = np.asarray(grid[0], dtype=np.float64).ravel()
            weights = np.asarray(grid[1], dtype=np.float64).ravel()
            if (
                fractions.shape != weights.shape
                or fractions.size == 0
                or np.any(fractions <= 0)
                or np.any(fractions > 1)
                or np.any(weights <= 0)
            ):
                raise StatsError(
                    "grid needs matching arrays of fractions in (0, 1] and positive weights, "
                    f"got {grid!r}"
                )
            weights = weights / weights.sum()
        self._fractions = fractions
        self._log_prior = np.log(weights)
        self._log_mk = np.zeros((self.runs, fractions.size))  # grid components
        self._lam = np.zeros(self.runs)  # kelly bet for the next batch
        self._log_factor = np.zeros((self.runs, n_cells))  # kelly / pbr next-batch ln F
        self._factor_bound = np.ones(self.runs)
        self._pbr_factors = PBRFactors(self.scenario, self.q, self.runs)
        self._set_functional(functional)
        self._prepare_next()

    # -- functional ---------------------------------------------------------------------------
    def _set_functional(self, functional: BellFunctional) -> None:
        if functional.coefficients.shape != self.scenario.shape:
            raise StatsError(
                f"functional has shape {functional.coefficients.shape}, the test was built for "
                f"{self.scenario.shape}"
            )
        z = (functional.coefficients / self.q[:, :, None, None]).ravel()
        bound = functional.local_bound
        spread = bound - float(z.min())
        if not spread > 0 and self.method != "pbr":
            raise StatsError(
                f"functional {functional.name!r} cannot be violated (score minimum >= local bound)"
            )
        self.functional = functional
        self._excess = z - bound  # Z - L per cell
        self._lam_cap = self.max_fraction / spread if spread > 0 else 0.0
        lam_k = self._fractions * self._lam_cap
        self._grid_log_t = np.log1p(lam_k[:, None] * self._excess[None, :])  # (K, C)

    def update_functional(self, functional: BellFunctional) -> None:
        """Bet on another functional from the next batch on (choose it from past data only).

        The evidence accumulated so far is kept; ``grid`` components keep their bet fractions.
        """
        if not isinstance(functional, BellFunctional):
            raise StatsError(f"functional must be a BellFunctional, got {functional!r}")
        self._set_functional(functional)
        self._prepare_next()

    # -- betting ------------------------------------------------------------------------------
    def _frequencies(self, prior_joint: NDArray[np.float64] | None) -> NDArray[np.float64]:
        n = self._past.sum(axis=1, keepdims=True)
        if prior_joint is None or self.prior_trials == 0:
            with np.errstate(invalid="ignore", divide="ignore"):
                return np.where(n > 0, self._past / np.maximum(n, 1), 0.0)
        return (self._past + self.prior_trials * prior_joint[None, :]) / (n + self.prior_trials)

    def _at_bound_joint(self) -> NDArray[np.float64]:
        # joint distribution of (x, y, a, b) for the optimal deterministic strategy: E[Z] = L
        opt = self.functional.local_optimum
        s = self.scenario
        vertex = vertex_tensor(opt.strategy_a, opt.strategy_b, s.outcomes_a, s.outcomes_b)
        return (self.q[:, :, None, None] * vertex).ravel()

    def _kelly(self) -> None:
        p_hat = self._frequencies(self._at_bound_joint())
        e = self._excess
        slope0 = p_hat @ e
        cap = self._lam_cap
        lo = np.zeros(self.runs)
        hi = np.full(self.runs, cap)
        active = (slope0 > 0) & (self.trials >= self.min_trials)
        for _ in range(45):  # bisection on the decreasing derivative of the concave growth
            mid = 0.5 * (lo + hi)
            slope = (p_hat * (e / (1.0 + mid[:, None] * e))).sum(axis=1)
            up = slope > 0
            lo = np.where(up, mid, lo)
            hi = np.where(up, hi, mid)
        lam = np.where(active, lo, 0.0)
        self._lam = lam
        self._log_factor = np.log1p(lam[:, None] * e[None, :])
        self._check_linear()

    def _check_linear(self) -> None:
        # sum_xy q (1 + lam (Z - L)) over a strategy is 1 + lam (I_strategy - L) <= 1; the exact
        # check costs one maximisation per stream, so ensembles may skip it
        if self.check_factors:
            factors = self.next_factor()
            self._factor_bound = np.array(
                [max_local_expectation(f, self.q) for f in factors], dtype=np.float64
            )
        else:
            self._factor_bound = np.ones(self.runs)

    def _pbr(self) -> None:
        shape = self.scenario.shape
        d = self.scenario.outcomes_a * self.scenario.outcomes_b
        pairs = self._past.reshape(self.runs, shape[0] * shape[1], d)
        n_xy = pairs.sum(axis=2, keepdims=True)
        kappa = max(self.prior_trials, 1e-9)
        predicted = ((pairs + kappa / d) / (n_xy + kappa)).reshape(self.runs, -1)
        active = (self.trials >= self.min_trials) & (self.trials > 0)
        self._log_factor, self._factor_bound = self._pbr_factors.factors(predicted, active)
        if self.check_factors:  # independent exhaustive check via labwatch.strategies
            for r, f in enumerate(self.next_factor()):
                self._factor_bound[r] = max(self._factor_bound[r], max_local_expectation(f, self.q))

    def _prepare_next(self) -> None:
        if self.method == "kelly":
            self._kelly()
        elif self.method == "pbr":
            self._pbr()
        else:
            self._check_linear()

    def _grid_posterior(self) -> NDArray[np.float64]:
        logw = self._log_prior[None, :] + self._log_mk
        return np.exp(logw - _logsumexp(logw, axis=1)[:, None])

    # -- public -------------------------------------------------------------------------------
    def update(self, counts: ArrayLike) -> None:
        """Test one batch per stream: ``counts`` has shape ``(runs, m_A, m_B, d_A, d_B)``."""
        arr = np.asarray(counts)
        expected = (self.runs,) + self.scenario.shape
        if arr.shape != expected:
            raise StatsError(f"batch counts have shape {arr.shape}, expected {expected}")
        if arr.dtype.kind == "f":
            if not np.all(np.isfinite(arr)) or np.any(arr != np.round(arr)):
                raise StatsError("counts must be whole numbers")
        elif arr.dtype.kind not in "iu":
            raise StatsError(f"counts must be integers, got dtype {arr.dtype}")
        n = arr.reshape(self.runs, -1).astype(np.float64)
        if np.any(n < 0):
            raise StatsError("counts must be non-negative")
        if self.method == "grid":
            self._log_mk += n @ self._grid_log_t.T
            self.log_m = _logsumexp(self._log_mk + self._log_prior[None, :], axis=1)
        else:
            with np.errstate(invalid="ignore"):
                inc = np.where(n > 0, n * self._log_factor, 0.0).sum(axis=1)
            self.log_m = self.log_m + inc
        self.log_m_max = np.maximum(self.log_m_max, self.log_m)
        self._past += n
        self.trials = self.trials + n.sum(axis=1).astype(np.int64)
        self.batches += 1
        self.history_trials.append(self.trials.copy())
        self.history_log_m.append(self.log_m.copy())
        self._prepare_next()

    @property
    def p_value(self) -> NDArray[np.float64]:
        """``min(1, 1 / max_s M_s)`` per stream."""
        return np.minimum(1.0, np.exp(-self.log_m_max))

    def next_factor(self) -> NDArray[np.float64]:
        """Test factor the next trial of each stream will use, shape ``(runs, m_A, m_B, d_A, d_B)``.

        For ``grid`` this is the posterior-weighted mixture of the component factors (the
        mixture's factor for the first trial of the next batch).
        """
        shape = (self.runs,) + self.scenario.shape
        if self.method == "grid":
            post = self._grid_posterior()
            return (post @ np.exp(self._grid_log_t)).reshape(shape)
        return np.exp(self._log_factor).reshape(shape)

    def bet(self) -> NDArray[np.float64]:
        """Next batch's bet ``lam`` (``kelly``), its posterior mean (``grid``), ``nan`` (``pbr``)."""
        if self.method == "grid":
            return self._grid_posterior() @ (self._fractions * self._lam_cap)
        if self.method == "kelly":
            return self._lam.copy()
        return np.full(self.runs, np.nan)

    def growth_per_trial(self) -> NDArray[np.float64]:
        """Plug-in estimate of ``E[ln F]`` per trial for the next batch (nats), per stream."""
        p_hat = self._frequencies(None)
        if self.method == "grid":
            return np.max(p_hat @ self._grid_log_t.T, axis=1)
        with np.errstate(invalid="ignore"):
            return np.where(p_hat > 0, p_hat * self._log_factor, 0.0).sum(axis=1)

    def assumptions(self) -> tuple[str, ...]:
        """Assumption labels of the p-values."""
        labels = ("random settings", "stopping-safe")
        if self.no_click_discarded:
            labels += ("fair sampling",)
        return labels


class LocalRealismTest:
    """Stopping-safe test of local realism on one random-setting stream.

    Parameters
    ----------
    functional : BellFunctional
        Inequality ``I <= L`` to bet on.
    setting_probabilities : array_like, shape (m_A, m_B)
        ``q(x, y)``: every trial's settings are drawn independently from it; all entries > 0.
    method : {"grid", "kelly", "pbr"}
        Betting method (see module docstring).  Default ``"grid"``.
    **options
        ``max_fraction``, ``grid``, ``prior_trials``, ``min_trials``, ``no_click_discarded``,
        ``check_factors`` (default ``True`` here; see :class:`LocalRealismEnsemble`).

    Examples
    --------
    >>> import numpy as np
    >>> from labwatch.bell import chsh
    >>> test = LocalRealismTest(chsh(), np.full((2, 2), 0.25))
    >>> batch = np.zeros((2, 2, 2, 2), dtype=int)
    >>> batch[:, :, 0, 0] = batch[:, :, 1, 1] = 10   # perfectly correlated ...
    >>> batch[1, 1] = [[0, 10], [10, 0]]              # ... except (1, 1): a PR box
    >>> result = test.update(batch)
    >>> result.p_value < 1e-3
    True
    """

    def __init__(
        self,
        functional: BellFunctional,
        setting_probabilities: ArrayLike,
        method: str = "grid",
        **options: object,
    ) -> None:
        options.setdefault("check_factors", True)
        self._engine = LocalRealismEnsemble(
            functional,
            setting_probabilities,
            1,
            method,
            **options,  # type: ignore[arg-type]
        )
        self._increments: list[tuple[int, float]] = []

    @property
    def functional(self) -> BellFunctional:
        """The functional bet on for the next batch."""
        return self._engine.functional

    @property
    def method(self) -> str:
        return self._engine.method

    @property
    def setting_probabilities(self) -> NDArray[np.float64]:
        return self._engine.q

    def update(self, counts: ArrayLike) -> LocalRealismResult:
        """Multiply in one batch of random-setting trials, ``counts`` of shape (m_A, m_B, d_A, d_B).

        The batch's factor was fixed from earlier batches only.  Returns the new snapshot.
        """
        n = self._engine.scenario.check_counts(counts)
        before = float(self._engine.log_m[0])
        self._engine.update(n[None])
        self._increments.append((int(n.sum()), float(self._engine.log_m[0]) - before))
        return self.result()

    def update_functional(self, functional: BellFunctional) -> None:
        """Bet on ``functional`` from the next batch on; choose it from past data only."""
        self._engine.update_functional(functional)

    @property
    def p_value(self) -> float:
        """Stopping-safe p-value ``min(1, 1 / max_s M_s)`` after the batches so far."""
        return float(self._engine.p_value[0])

    @property
    def log_m(self) -> float:
        """``ln M`` now."""
        return float(self._engine.log_m[0])

    @property
    def log10_evidence(self) -> float:
        """``log10(1 / p_value)``."""
        return float(self._engine.log_m_max[0]) / _LN10

    @property
    def trials(self) -> int:
        return int(self._engine.trials[0])

    @property
    def log_m_history(self) -> tuple[tuple[int, float], ...]:
        """``(trials, ln M)`` after every batch."""
        return tuple(
            (int(t[0]), float(m[0]))
            for t, m in zip(self._engine.history_trials, self._engine.history_log_m)
        )

    @property
    def batch_increments(self) -> tuple[tuple[int, float], ...]:
        """``(trials in batch, change of ln M)`` for every batch (input of the forecast)."""
        return tuple(self._increments)

    def forecast(
        self, p_target: float, trial_rate: float | None = None, **options: object
    ) -> TimeToTarget:
        """Time-to-target forecast from the batch increments so far.

        ``options`` go to :func:`labwatch.stats.forecast.forecast_time_to_target`
        (``window_trials``, ``growth_per_trial``).
        """
        e = self._engine
        return forecast_time_to_target(
            self._increments,
            p_target,
            float(e.log_m[0]),
            float(e.log_m_max[0]),
            trial_rate,
            **options,  # type: ignore[arg-type]
        )

    def next_factor(self) -> NDArray[np.float64]:
        """The test factor the next trial will use, shape (m_A, m_B, d_A, d_B)."""
        return self._engine.next_factor()[0]

    def result(self) -> LocalRealismResult:
        """Frozen snapshot of the test now."""
        e = self._engine
        trials = int(e.trials[0])
        log_m = float(e.log_m[0])
        log_m_max = float(e.log_m_max[0])
        return LocalRealismResult(
            p_value=float(e.p_value[0]),
            log_m=log_m,
            log_m_max=log_m_max,
            log10_evidence=log_m_max / _LN10,
            trials=trials,
            batches=e.batches,
            method=e.method,
            functional=e.functional.name,
            local_bound=e.functional.local_bound,
            bet=float(e.bet()[0]),
            growth_per_trial=float(e.growth_per_trial()[0]),
            realised_growth_per_trial=log_m / trials if trials > 0 else math.nan,
            factor_bound=float(e._factor_bound[0]),
            assumptions=e.assumptions(),
        )
