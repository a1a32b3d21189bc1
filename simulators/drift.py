"""Slow drifts of a source's parameters: wandering waveplates and an operator who aligns.

A *path* is a deterministic function of source time ``t`` (s) -> parameter value.  Paths are
seeded and do not depend on the order in which times are queried, so a run replays exactly.
:class:`DriftingSource` rebuilds a stationary source from the paths at every query time.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from labwatch.scenario import Scenario
from simulators.base import ProbabilitySource
from simulators.quantum import polarization_source

__all__ = [
    "Constant",
    "DriftingSource",
    "ExponentialRelaxation",
    "RandomWalk",
    "Sum",
    "drifting_polarization_source",
]

#: Grid steps generated per random-walk chunk.
_CHUNK = 4096


@dataclass(frozen=True)
class Constant:
    """A parameter that does not drift."""

    value: float

    def __call__(self, t: float) -> float:
        return float(self.value)


@dataclass(frozen=True)
class ExponentialRelaxation:
    """``final + (initial - final) exp(-t / time_constant_s)`` for ``t >= 0``.

    Models an operator who corrects a misalignment (or a visibility that recovers) with a
    characteristic time ``time_constant_s`` (s).
    """

    initial: float
    final: float
    time_constant_s: float

    def __post_init__(self) -> None:
        if not (self.time_constant_s > 0 and math.isfinite(self.time_constant_s)):
            raise ValueError(f"time_constant_s must be positive, got {self.time_constant_s!r}")

    def __call__(self, t: float) -> float:
        decay = math.exp(-max(float(t), 0.0) / self.time_constant_s)
        return self.final + (self.initial - self.final) * decay


@dataclass(frozen=True)
class RandomWalk:
    """A seeded Gaussian random walk on a time grid, linearly interpolated.

    ``W(0) = start``; each grid step of ``dt_s`` adds an independent
    ``N(0, (step_per_sqrt_s)^2 dt_s)`` increment (a sampled Wiener process with diffusion
    ``step_per_sqrt_s`` units per sqrt(second)).  Increments of chunk ``k`` come from
    ``default_rng([seed, k])``, so values do not depend on query order.
    """

    step_per_sqrt_s: float
    dt_s: float = 1.0
    seed: int = 0
    start: float = 0.0
    _cache: list[NDArray[np.float64]] = field(default_factory=list, repr=False, compare=False)

    def __post_init__(self) -> None:
        if not (self.dt_s > 0 and math.isfinite(self.dt_s)):
            raise ValueError(f"dt_s must be positive, got {self.dt_s!r}")
        if not (self.step_per_sqrt_s >= 0 and math.isfinite(self.step_per_sqrt_s)):
            raise ValueError(f"step_per_sqrt_s must be >= 0, got {self.step_per_sqrt_s!r}")

    def _node(self, n: int) -> float:
        """Walk value at grid node ``n >= 0``."""
        if n == 0:
            return float(self.start)
        chunk, pos = divmod(n - 1, _CHUNK)
        while len(self._cache) <= chunk:
            k = len(self._cache)
            rng = np.random.default_rng([int(self.seed), k])
            steps = rng.standard_normal(_CHUNK) * self.step_per_sqrt_s * math.sqrt(self.dt_s)
            base = self._cache[-1][-1] if self._cache else float(self.start)
            self._cache.append(base + np.cumsum(steps))
        return float(self._cache[chunk][pos])

    def __call__(self, t: float) -> float:
        s = max(float(t), 0.0) / self.dt_s
        n = int(math.floor(s))
        frac = s - n
        lo = self._node(n)
        return lo if frac == 0.0 else lo + frac * (self._node(n + 1) - lo)


@dataclass(frozen=True)
class Sum:
    """The sum of several paths (e.g. a relaxing offset plus a random walk)."""

    parts: tuple[Callable[[float], float], ...]

    def __call__(self, t: float) -> float:
        return float(sum(part(t) for part in self.parts))


class DriftingSource(ProbabilitySource):
    """A source whose parameters follow deterministic paths in time.

    Parameters
    ----------
    build : callable
        ``build(**params) -> ProbabilitySource``: a stationary source for given parameters.
    paths : mapping of str to callable
        Parameter name -> path ``t -> value``; passed to ``build`` as keyword arguments.
    fixed : mapping, optional
        Further keyword arguments passed to ``build`` unchanged.

    The scenario is fixed by the source at ``t = 0``; a path that changes it is an error.
    """

    def __init__(
        self,
        build: Callable[..., ProbabilitySource],
        paths: Mapping[str, Callable[[float], float]],
        fixed: Mapping[str, Any] | None = None,
    ) -> None:
        self._build = build
        self.paths = dict(paths)
        self.fixed = dict(fixed or {})
        self._last: tuple[float, ProbabilitySource] | None = None
        self.scenario: Scenario = self.source_at(0.0).scenario

    def parameters(self, t: float) -> dict[str, float]:
        """Parameter values at time ``t`` (s)."""
        return {name: path(t) for name, path in self.paths.items()}

    def source_at(self, t: float) -> ProbabilitySource:
        """The stationary source with the parameters of time ``t`` (cached for the last t)."""
        t = float(t)
        if self._last is not None and self._last[0] == t:
            return self._last[1]
        src = self._build(**self.fixed, **self.parameters(t))
        if hasattr(self, "scenario") and src.scenario != self.scenario:
            raise ValueError(f"drift changed the scenario to {src.scenario} at t={t}")
        self._last = (t, src)
        return src

    def trial_rate(self, t: float) -> float:
        return self.source_at(t).trial_rate(t)

    def probabilities(self, t: float) -> NDArray[np.float64]:
        p = self.source_at(t).probabilities(t)
        assert p is not None  # the builder returns ProbabilitySources
        return p

    def singles_rates(self, t: float) -> tuple[NDArray[np.float64], NDArray[np.float64]] | None:
        return self.source_at(t).singles_rates(t)


def drifting_polarization_source(
    seed: int = 0,
    initial_misalignment_deg: float = 6.0,
    alignment_time_s: float = 120.0,
    wander_deg_per_sqrt_s: float = 0.02,
    initial_visibility: float = 0.90,
    final_visibility: float = 0.98,
    **kwargs: Any,
) -> DriftingSource:
    """:func:`polarization_source` with a wandering, slowly corrected Bob half-wave plate.

    Bob's extra HWP angle is ``initial_misalignment_deg * exp(-t / alignment_time_s)`` plus a
    seeded random walk of ``wander_deg_per_sqrt_s`` degrees per sqrt(second) (one-second
    grid); the visibility recovers from ``initial_visibility`` to ``final_visibility`` with the
    same time constant.  Further keyword arguments go to :func:`polarization_source`.
    """
    misalignment = Sum(
        (
            ExponentialRelaxation(initial_misalignment_deg, 0.0, alignment_time_s),
            RandomWalk(wander_deg_per_sqrt_s, dt_s=1.0, seed=seed),
        )
    )
    visibility = ExponentialRelaxation(initial_visibility, final_visibility, alignment_time_s)
    return DriftingSource(
        polarization_source,
        {"misalignment_deg": misalignment, "visibility": visibility},
        fixed=kwargs,
    )
