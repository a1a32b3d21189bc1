"""Local-polytope engine: white-noise visibility by linear programming (HiGHS via highspy).

The only part of labwatch that imports :mod:`highspy`.

* :func:`white_noise_visibility` / :class:`VisibilitySolver` -- the visibility LP, its dual
  certificate (a :class:`labwatch.bell.BellFunctional`) and a local model when there is one;
  full vertex enumeration or column generation, chosen by vertex count.
* :func:`project_no_signalling`, :func:`no_signalling_test` -- finite-data preparation.
* :func:`visibility_from_counts` -- projection, visibility, delta-method error and a seeded
  parametric bootstrap.
* :func:`subset_visibilities` -- every choice of a few settings per party.
"""

from __future__ import annotations

from labwatch.polytope._highs import SolverError
from labwatch.polytope.nosignalling import (
    NoSignallingProjection,
    NoSignallingProjector,
    NoSignallingTest,
    no_signalling_test,
    project_no_signalling,
)
from labwatch.polytope.subsets import SubsetSearch, SubsetVisibility, subset_visibilities
from labwatch.polytope.uncertainty import (
    CountsVisibility,
    VisibilityInterval,
    bootstrap_visibilities,
    visibility_from_counts,
    visibility_stderr,
)
from labwatch.polytope.visibility import (
    DEFAULT_V_MAX,
    MAX_ENUMERATED_VERTICES,
    LocalDecomposition,
    NoiseError,
    SignallingError,
    VisibilityResult,
    VisibilitySolver,
    white_noise_visibility,
)

__all__ = [
    "CountsVisibility",
    "DEFAULT_V_MAX",
    "LocalDecomposition",
    "MAX_ENUMERATED_VERTICES",
    "NoSignallingProjection",
    "NoSignallingProjector",
    "NoSignallingTest",
    "NoiseError",
    "SignallingError",
    "SolverError",
    "SubsetSearch",
    "SubsetVisibility",
    "VisibilityInterval",
    "VisibilityResult",
    "VisibilitySolver",
    "bootstrap_visibilities",
    "no_signalling_test",
    "project_no_signalling",
    "subset_visibilities",
    "visibility_from_counts",
    "visibility_stderr",
    "white_noise_visibility",
]
