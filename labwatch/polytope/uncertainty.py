r"""Uncertainty of the visibility estimated from counts.

Delta method through the certificate
------------------------------------
At the optimum the certificate ``I`` (white noise 0, local bound 1) scores the projected
data ``I(p_hat) = 1 / v``: the visibility is where the line ``s -> I(s p + (1 - s) n) = s I(p)``
crosses the local bound.  By LP sensitivity (the dual ``y`` is the gradient of the optimal
value in the right-hand side, for a non-degenerate optimum) the first-order change of ``v``
under a small no-signalling change ``dp`` is

.. math:: dv = -v^2\, dI(p) = -v^2 \sum \beta\, dp,

and ``dp = Pi df`` with ``Pi`` the linear part of the count-weighted projection
(:meth:`labwatch.polytope.NoSignallingProjector.linear_map_transpose`).  With
``beta~ = Pi^T beta`` and independent multinomials per setting pair,

.. math::
    \sigma_v = v^2 \sqrt{\sum_{xy} \frac{\sum_{ab} \tilde\beta^2 \hat p
    - (\sum_{ab} \tilde\beta \hat p)^2}{N_{xy}}}.

Assumptions: fixed ``N_xy``, i.i.d. trials, Gaussian limit, the projection's bounds inactive
and the LP optimum non-degenerate (the certificate does not switch inside the error bar).

Parametric bootstrap
--------------------
``B`` replicates ``N*_xy ~ Multinomial(N_xy, p_hat_xy)`` drawn with a seeded
``numpy.random.Generator``; each is projected and solved on one warm
:class:`labwatch.polytope.VisibilitySolver`.  The percentile interval is the
``(alpha/2, 1 - alpha/2)`` quantiles of the replicate visibilities.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labwatch.polytope.nosignalling import (
    NoSignallingProjection,
    NoSignallingProjector,
    NoSignallingTest,
    no_signalling_test,
)
from labwatch.polytope.visibility import VisibilityResult, VisibilitySolver
from labwatch.scenario import Scenario

__all__ = [
    "CountsVisibility",
    "VisibilityInterval",
    "bootstrap_visibilities",
    "visibility_from_counts",
    "visibility_stderr",
]

#: Assumption labels of the figures below.
ASSUMPTIONS: tuple[str, ...] = ("fixed n", "Gaussian", "i.i.d.")


@dataclass(frozen=True)
class VisibilityInterval:
    """Percentile bootstrap interval of the visibility."""

    low: float
    high: float
    confidence_level: float

    def __str__(self) -> str:
        return f"[{self.low:.5f}, {self.high:.5f}] ({100 * self.confidence_level:g}% bootstrap)"


@dataclass(frozen=True)
class CountsVisibility:
    """Visibility of a counts tensor with its uncertainty.

    Attributes
    ----------
    visibility : float
        Visibility of the no-signalling projection of the frequencies.
    stderr : float
        Delta-method standard error (``nan`` without a certificate).
    interval : VisibilityInterval or None
        Percentile bootstrap interval (``None`` when ``bootstrap=0``).
    bootstrap : ndarray or None, shape (B,)
        Replicate visibilities.
    result : VisibilityResult
        The LP result at the projected point (certificate, status, timing).
    projection : NoSignallingProjection
    signalling : NoSignallingTest
        Diagnostic: do the raw counts signal?
    assumptions : tuple of str
    """

    visibility: float
    stderr: float
    interval: VisibilityInterval | None
    bootstrap: NDArray[np.float64] | None
    result: VisibilityResult
    projection: NoSignallingProjection
    signalling: NoSignallingTest
    assumptions: tuple[str, ...] = ASSUMPTIONS

    def __post_init__(self) -> None:
        if self.bootstrap is not None:
            arr = np.array(self.bootstrap, dtype=np.float64, copy=True)
            arr.setflags(write=False)
            object.__setattr__(self, "bootstrap", arr)

    def __str__(self) -> str:
        text = f"visibility {self.visibility:.5f} ± {self.stderr:.5f}"
        if self.interval is not None:
            text += f", {self.interval}"
        return text


def visibility_stderr(
    result: VisibilityResult,
    projection: NoSignallingProjection,
    projector: NoSignallingProjector | None = None,
) -> float:
    """Delta-method standard error of the visibility (module docstring).

    ``projector`` (the one that made ``projection``) saves rebuilding the projection model.
    """
    if result.certificate is None or result.capped:
        return math.nan
    scenario = Scenario.from_shape(projection.probabilities.shape)
    if projector is None:
        projector = NoSignallingProjector(scenario, projection.trials)
    beta = projector.linear_map_transpose(result.certificate.coefficients)
    p = projection.probabilities
    first = np.sum(beta * p, axis=(2, 3))
    second = np.sum(beta**2 * p, axis=(2, 3))
    var = np.maximum(second - first**2, 0.0) / projection.trials
    return float(result.visibility**2 * math.sqrt(float(np.sum(var))))


def bootstrap_visibilities(
    probabilities: ArrayLike,
    trials: ArrayLike,
    replicates: int,
    rng: np.random.Generator,
    solver: VisibilitySolver | None = None,
    projector: NoSignallingProjector | None = None,
) -> NDArray[np.float64]:
    """Visibilities of ``replicates`` multinomial resamples of ``probabilities``.

    Parameters
    ----------
    probabilities : array_like, shape (m_A, m_B, d_A, d_B)
        The model to resample from (the projected estimate ``p_hat``).
    trials : array_like of int, shape (m_A, m_B)
        ``N_xy`` of every replicate.
    replicates : int
    rng : numpy.random.Generator
        Seeded generator; the same seed gives the same replicates.
    solver, projector : optional
        Reused (warm) models; built when omitted.
    """
    p = np.clip(np.asarray(probabilities, dtype=np.float64), 0.0, None)
    scenario = Scenario.from_shape(p.shape)
    n = np.asarray(trials, dtype=np.int64)
    if not isinstance(rng, np.random.Generator):
        raise TypeError(f"rng must be a numpy.random.Generator, got {type(rng).__name__}")
    if replicates < 0:
        raise ValueError(f"replicates must be >= 0, got {replicates!r}")
    solver = solver or VisibilitySolver(scenario)
    projector = projector or NoSignallingProjector(scenario, n)
    flat = p.reshape(scenario.settings_a, scenario.settings_b, -1)
    flat = flat / flat.sum(axis=2, keepdims=True)
    out = np.empty(int(replicates))
    for i in range(int(replicates)):
        sample = rng.multinomial(n, flat).reshape(scenario.shape)
        out[i] = solver.solve(projector.project(sample).probabilities).visibility
    return out


def visibility_from_counts(
    counts: ArrayLike,
    bootstrap: int = 0,
    rng: np.random.Generator | None = None,
    *,
    noise: ArrayLike | None = None,
    confidence_level: float = 0.95,
    solver: VisibilitySolver | None = None,
    **options: object,
) -> CountsVisibility:
    """Visibility of a counts tensor: project, solve, delta-method error, optional bootstrap.

    Parameters
    ----------
    counts : array_like of int, shape (m_A, m_B, d_A, d_B)
        Every setting pair needs at least one trial.
    bootstrap : int
        Parametric bootstrap replicates (0: none).
    rng : numpy.random.Generator, optional
        Needed when ``bootstrap > 0``; pass a seeded one for reproducible intervals.
    noise : array_like, optional
        Noise model (uniform when omitted).
    confidence_level : float
        Of the percentile interval.
    solver : VisibilitySolver, optional
        A live monitor passes its warm solver; built from ``noise`` and ``options`` otherwise.

    Examples
    --------
    >>> import numpy as np
    >>> from labwatch.models import cglmp_bases, maximally_entangled, probabilities
    >>> a, b = cglmp_bases(2)
    >>> p = probabilities(maximally_entangled(2), a, b)
    >>> counts = np.random.default_rng(1).multinomial(5000, p.reshape(2, 2, 4)).reshape(p.shape)
    >>> res = visibility_from_counts(counts, bootstrap=50, rng=np.random.default_rng(2))
    >>> 0.65 < res.visibility < 0.76
    True
    """
    arr = np.asarray(counts)
    scenario = Scenario.from_shape(arr.shape)
    n = scenario.check_counts(arr)
    if not 0.0 < confidence_level < 1.0:
        raise ValueError(f"confidence_level must be in (0, 1), got {confidence_level!r}")
    if bootstrap and rng is None:
        raise ValueError("bootstrap > 0 needs a numpy.random.Generator rng (seed it to reproduce)")
    trials = n.sum(axis=(2, 3))
    projector = NoSignallingProjector(scenario, trials)
    projection = projector.project(n)
    if solver is None:
        solver = VisibilitySolver(scenario, noise, **options)  # type: ignore[arg-type]
    elif solver.scenario != scenario:
        raise ValueError(f"solver is for {solver.scenario}, counts are {scenario}")
    result = solver.solve(projection.probabilities)
    stderr = visibility_stderr(result, projection, projector)
    interval = None
    reps = None
    if bootstrap:
        assert rng is not None
        reps = bootstrap_visibilities(
            projection.probabilities, trials, int(bootstrap), rng, solver, projector
        )
        alpha = 1.0 - confidence_level
        low, high = np.quantile(reps, [alpha / 2.0, 1.0 - alpha / 2.0])
        interval = VisibilityInterval(float(low), float(high), confidence_level)
        # Leave the solver's basis at the data point for the next live refresh.
        result = solver.solve(projection.probabilities)
    return CountsVisibility(
        visibility=result.visibility,
        stderr=stderr,
        interval=interval,
        bootstrap=reps,
        result=result,
        projection=projection,
        signalling=no_signalling_test(n),
    )
