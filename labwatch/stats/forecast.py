"""Time-to-target forecast for the stopping-safe test of local realism.

The running evidence ``ln M`` grows by a random amount per batch.  For a stationary source it is
close to a random walk with drift ``g`` nats per trial and variance ``s^2`` per trial, so the
number of further trials to raise ``ln M`` by ``r`` nats is about ``r / g`` with spread

    sd^2 = r s^2 / g^3            (first passage of a drifted random walk: inverse Gaussian)
         + (r / g^2)^2 se(g)^2    (uncertainty of the estimated drift),

both estimated from the per-batch increments ``(n_b, d_b)``: ``g = sum d_b / sum n_b`` and
``s^2 = sum_b (d_b - n_b g)^2 / n_b / (B - 1)``, ``se(g) = s / sqrt(sum n_b)``.  The time
follows from the trial rate.  A forecast, not a guarantee: it assumes the source stays as it
was during the window.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from labwatch.stats._checks import StatsError, check_level

__all__ = ["TimeToTarget", "forecast_time_to_target"]


@dataclass(frozen=True)
class TimeToTarget:
    """Forecast of the further trials and time until ``p <= p_target``.

    Attributes
    ----------
    p_target : float
    reached : bool
        The target was already reached (``ln max M >= ln(1/p_target)``).
    remaining_nats : float
        ``ln(1/p_target) - ln M`` now (0 when reached).
    growth_per_trial : float
        Estimated drift of ``ln M`` (nats/trial).
    growth_stderr : float
        Its standard error (nats/trial); ``nan`` with fewer than two batches.
    trials, trials_low, trials_high : float
        Expected further trials and a one-sd range; ``inf`` when the evidence is not growing.
    seconds, seconds_low, seconds_high : float
        The same in seconds at ``trial_rate``.
    trial_rate : float
        Trials per second used (``nan`` if unknown).
    batches : int
        Batches in the estimation window.
    assumptions : tuple of str
    """

    p_target: float
    reached: bool
    remaining_nats: float
    growth_per_trial: float
    growth_stderr: float
    trials: float
    trials_low: float
    trials_high: float
    seconds: float
    seconds_low: float
    seconds_high: float
    trial_rate: float
    batches: int
    assumptions: tuple[str, ...] = ("stationary source", "forecast")

    def __str__(self) -> str:
        if self.reached:
            return f"target p <= {self.p_target:g} reached"
        if not math.isfinite(self.trials):
            return f"p <= {self.p_target:g}: evidence not growing"
        return (
            f"p <= {self.p_target:g} in ~{self.trials:.0f} trials "
            f"({self.trials_low:.0f}-{self.trials_high:.0f}), ~{self.seconds:.3g} s"
        )


def forecast_time_to_target(
    increments: Sequence[tuple[int, float]],
    p_target: float,
    log_m: float,
    log_m_max: float,
    trial_rate: float | None = None,
    *,
    window_trials: int | None = None,
    growth_per_trial: float | None = None,
) -> TimeToTarget:
    """Forecast the trials and time until the stopping-safe p-value reaches ``p_target``.

    Parameters
    ----------
    increments : sequence of (int, float)
        ``(trials in batch, change of ln M)`` per batch, oldest first
        (:attr:`LocalRealismTest.batch_increments`).
    p_target : float
        Target p-value, in (0, 1).
    log_m, log_m_max : float
        ``ln M`` now and its running maximum.
    trial_rate : float, optional
        Current trials per second (e.g. the source's coincidence rate); times are ``nan``
        without it.
    window_trials : int, optional
        Use only the most recent batches covering about this many trials (drifting sources).
    growth_per_trial : float, optional
        Use this drift (nats/trial), e.g. a model's statistical strength, instead of the
        increments' mean; the spread still comes from the increments.

    Returns
    -------
    TimeToTarget
    """
    p = check_level("p_target", p_target)
    rate = math.nan if trial_rate is None else float(trial_rate)
    if not (math.isnan(rate) or rate > 0):
        raise StatsError(f"trial_rate must be positive, got {trial_rate!r}")
    target = math.log(1.0 / p)
    rows = [(int(n), float(d)) for n, d in increments if int(n) > 0]
    if window_trials is not None:
        if window_trials < 1:
            raise StatsError(f"window_trials must be positive, got {window_trials!r}")
        kept, total = [], 0
        for n, d in reversed(rows):
            if total >= window_trials:
                break
            kept.append((n, d))
            total += n
        rows = kept[::-1]
    n = np.array([r[0] for r in rows], dtype=np.float64)
    d = np.array([r[1] for r in rows], dtype=np.float64)
    total = float(n.sum())
    if growth_per_trial is not None:
        g = float(growth_per_trial)
    else:
        g = float(d.sum() / total) if total > 0 else math.nan
    if len(rows) >= 2:
        s2 = float(np.sum((d - n * g) ** 2 / n) / (len(rows) - 1))
        se = math.sqrt(s2 / total)
    else:
        s2, se = math.nan, math.nan
    reached = log_m_max >= target
    remaining = 0.0 if reached else target - log_m
    if reached:
        trials = low = high = 0.0
    elif not (g > 0):
        trials = low = high = math.inf
    else:
        trials = remaining / g
        parts = [remaining * s2 / g**3 if math.isfinite(s2) else 0.0]
        if math.isfinite(se):
            parts.append((remaining / g**2 * se) ** 2)
        sd = math.sqrt(sum(parts))
        low = max(0.0, trials - sd)
        high = trials + sd if (not math.isfinite(se) or g - se > 0) else math.inf
    return TimeToTarget(
        p_target=p,
        reached=reached,
        remaining_nats=remaining,
        growth_per_trial=g,
        growth_stderr=se,
        trials=trials,
        trials_low=low,
        trials_high=high,
        seconds=trials / rate,
        seconds_low=low / rate,
        seconds_high=high / rate,
        trial_rate=rate,
        batches=len(rows),
    )
