"""Statistics for a live Bell monitor: fixed-n figures, stopping-safe tests and estimates.

Pure core (numpy/scipy only).  Every figure carries assumption labels:

- :mod:`~labwatch.stats.intervals` -- Clopper-Pearson intervals and the common-practice
  sigma figure (``fixed n``, ``Gaussian``, ``i.i.d.``).
- :mod:`~labwatch.stats.supermartingale` -- test of local realism for random-setting streams,
  valid under optional stopping and memory (``random settings``, ``stopping-safe``).
- :mod:`~labwatch.stats.confseq` -- confidence sequences for correlators and Bell values
  (``i.i.d.``, ``stopping-safe``; cannot test local realism).
- :mod:`~labwatch.stats.strength` -- statistical strength (KL divergence to the local polytope).
- :mod:`~labwatch.stats.target` and :mod:`~labwatch.stats.forecast` -- stopping targets and
  time-to-target forecasts.

See ``docs/statistics.md`` for what each figure means.
"""

from __future__ import annotations

from labwatch.stats._checks import StatsError
from labwatch.stats.confseq import (
    CONFSEQ_METHODS,
    BellSequenceResult,
    BellValueSequence,
    BoundedMeanSequence,
    MeanSequenceSnapshot,
)
from labwatch.stats.factors import (
    choose_functional,
    kelly_growth,
    lambda_max,
    linear_factor,
    max_local_expectation,
    score_tensor,
)
from labwatch.stats.forecast import TimeToTarget, forecast_time_to_target
from labwatch.stats.intervals import (
    ConfidenceInterval,
    OutcomeIntervals,
    SigmaFigure,
    clopper_pearson,
    clopper_pearson_array,
    clopper_pearson_counts,
    sigma_figure,
)
from labwatch.stats.klprojection import LocalProjection, kl_projection
from labwatch.stats.strength import StatisticalStrength, statistical_strength
from labwatch.stats.supermartingale import (
    BETTING_METHODS,
    LocalRealismEnsemble,
    LocalRealismResult,
    LocalRealismTest,
    default_bet_grid,
)
from labwatch.stats.target import (
    TARGET_FORMS,
    ConfidenceTarget,
    TargetDecision,
    TargetParseError,
    TargetWatch,
    parse_target,
)

__all__ = [
    "BETTING_METHODS",
    "CONFSEQ_METHODS",
    "BellSequenceResult",
    "BellValueSequence",
    "BoundedMeanSequence",
    "MeanSequenceSnapshot",
    "ConfidenceInterval",
    "ConfidenceTarget",
    "LocalProjection",
    "LocalRealismEnsemble",
    "LocalRealismResult",
    "LocalRealismTest",
    "OutcomeIntervals",
    "SigmaFigure",
    "StatisticalStrength",
    "StatsError",
    "TARGET_FORMS",
    "TargetDecision",
    "TargetParseError",
    "TargetWatch",
    "TimeToTarget",
    "choose_functional",
    "clopper_pearson",
    "clopper_pearson_array",
    "clopper_pearson_counts",
    "default_bet_grid",
    "forecast_time_to_target",
    "kelly_growth",
    "kl_projection",
    "lambda_max",
    "linear_factor",
    "max_local_expectation",
    "parse_target",
    "score_tensor",
    "sigma_figure",
    "statistical_strength",
]
