"""Sub-scenario search: the visibility of every choice of a few settings per party.

With ``k`` settings per party an experiment may show its strongest nonlocality on a subset
(a visibility LP with more settings is never larger -- more settings can only help the data,
so ``v_full <= v_subset`` for every subset).  :func:`subset_visibilities` solves every choice
of ``size_a`` of Alice's and ``size_b`` of Bob's settings on one warm solver and reports the
best next to the full LP.
"""

from __future__ import annotations

import itertools
import time
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from labwatch.polytope.visibility import VisibilityResult, VisibilitySolver
from labwatch.scenario import Scenario

__all__ = ["SubsetSearch", "SubsetVisibility", "subset_visibilities"]


@dataclass(frozen=True)
class SubsetVisibility:
    """Visibility of the data restricted to some settings of each party."""

    settings_a: tuple[int, ...]
    settings_b: tuple[int, ...]
    visibility: float


@dataclass(frozen=True)
class SubsetSearch:
    """All subsets' visibilities, the best one and the full-scenario LP.

    Attributes
    ----------
    subsets : tuple of SubsetVisibility
        In enumeration order (lexicographic in Alice's, then Bob's subsets).
    best : SubsetVisibility
        Smallest visibility (the most nonlocal choice; first one on ties).
    full : VisibilityResult or None
        The LP with all settings (``None`` when not requested).
    size_a, size_b : int
    solve_time : float
        Seconds for the whole search.
    """

    subsets: tuple[SubsetVisibility, ...]
    best: SubsetVisibility
    full: VisibilityResult | None
    size_a: int
    size_b: int
    solve_time: float

    def __str__(self) -> str:
        full = "" if self.full is None else f"; all settings {self.full.visibility:.5f}"
        return (
            f"best {self.size_a}x{self.size_b} settings A{list(self.best.settings_a)} "
            f"B{list(self.best.settings_b)}: visibility {self.best.visibility:.5f} "
            f"of {len(self.subsets)} choices{full}"
        )


def subset_visibilities(
    probabilities: ArrayLike,
    size_a: int = 2,
    size_b: int | None = None,
    *,
    noise: ArrayLike | None = None,
    include_full: bool = True,
    **options: object,
) -> SubsetSearch:
    """Visibility of every choice of ``size_a`` x ``size_b`` settings.

    Parameters
    ----------
    probabilities : array_like, shape (m_A, m_B, d_A, d_B)
        No-signalling probabilities (project frequencies first).
    size_a : int
        Settings kept for Alice.
    size_b : int, optional
        Settings kept for Bob (default ``size_a``).
    noise : array_like, optional
        Full-scenario noise tensor, restricted along with the data.
    include_full : bool
        Also solve the LP with every setting.
    **options
        Passed to :class:`VisibilitySolver`.
    """
    start = time.perf_counter()
    p = np.asarray(probabilities, dtype=np.float64)
    scenario = Scenario.from_shape(p.shape)
    size_b = size_a if size_b is None else size_b
    for name, size, cap in (
        ("size_a", size_a, scenario.settings_a),
        ("size_b", size_b, scenario.settings_b),
    ):
        if (
            isinstance(size, bool)
            or not isinstance(size, (int, np.integer))
            or not 1 <= size <= cap
        ):
            raise ValueError(f"{name} must be an integer in [1, {cap}], got {size!r}")
    sub = Scenario(int(size_a), int(size_b), scenario.outcomes_a, scenario.outcomes_b)
    n = None if noise is None else np.asarray(noise, dtype=np.float64)
    solver = VisibilitySolver(sub, **options) if n is None else None  # type: ignore[arg-type]
    found: list[SubsetVisibility] = []
    for sa in itertools.combinations(range(scenario.settings_a), int(size_a)):
        for sb in itertools.combinations(range(scenario.settings_b), int(size_b)):
            part = p[np.ix_(sa, sb)]
            if n is None:
                assert solver is not None
                v = solver.solve(part).visibility
            else:  # the restricted noise differs per subset: one solver each
                v = VisibilitySolver(sub, n[np.ix_(sa, sb)], **options).solve(part).visibility  # type: ignore[arg-type]
            found.append(SubsetVisibility(sa, sb, float(v)))
    best = min(found, key=lambda s: s.visibility)
    full = VisibilitySolver(scenario, n, **options).solve(p) if include_full else None  # type: ignore[arg-type]
    return SubsetSearch(
        subsets=tuple(found),
        best=best,
        full=full,
        size_a=int(size_a),
        size_b=int(size_b),
        solve_time=time.perf_counter() - start,
    )
