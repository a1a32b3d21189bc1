"""Bell scenarios: how many settings and outcomes each of the two parties has.

Convention used everywhere in labwatch: a counts or probability tensor has shape
``(m_A, m_B, d_A, d_B)`` and index order ``[x, y, a, b]`` -- Alice's setting ``x``,
Bob's setting ``y``, Alice's outcome ``a``, Bob's outcome ``b``.  Counts are
non-negative integers; probabilities are non-negative and sum to one over
``(a, b)`` for every setting pair ``(x, y)``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "MAX_OUTCOMES",
    "MAX_SETTINGS",
    "Scenario",
    "ScenarioError",
]

#: Hard caps that keep a malicious or mistaken header from allocating absurd tensors.
MAX_SETTINGS = 32
MAX_OUTCOMES = 64


class ScenarioError(ValueError):
    """A tensor or a scenario description does not fit the Bell scenario."""


@dataclass(frozen=True)
class Scenario:
    """Two-party Bell scenario.

    Parameters
    ----------
    settings_a, settings_b : int
        Number of measurement settings of Alice (``m_A``) and Bob (``m_B``).
    outcomes_a, outcomes_b : int
        Number of outcomes per setting of Alice (``d_A``) and Bob (``d_B``); a
        no-click outcome, when kept, counts as one of them.

    Examples
    --------
    >>> Scenario(2, 2, 2, 2).shape
    (2, 2, 2, 2)
    """

    settings_a: int
    settings_b: int
    outcomes_a: int
    outcomes_b: int

    def __post_init__(self) -> None:
        for name, value, cap in (
            ("settings_a", self.settings_a, MAX_SETTINGS),
            ("settings_b", self.settings_b, MAX_SETTINGS),
            ("outcomes_a", self.outcomes_a, MAX_OUTCOMES),
            ("outcomes_b", self.outcomes_b, MAX_OUTCOMES),
        ):
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
                raise ScenarioError(f"{name} must be an integer, got {value!r}")
            if not 1 <= int(value) <= cap:
                raise ScenarioError(f"{name} must be between 1 and {cap}, got {value}")
            object.__setattr__(self, name, int(value))
        if self.outcomes_a < 2 or self.outcomes_b < 2:
            raise ScenarioError(
                f"each party needs at least 2 outcomes, got d_A={self.outcomes_a}, "
                f"d_B={self.outcomes_b}"
            )

    @classmethod
    def from_shape(cls, shape: ArrayLike) -> Scenario:
        """Scenario of a tensor shape ``(m_A, m_B, d_A, d_B)``."""
        dims = tuple(int(s) for s in np.asarray(shape).ravel())
        if len(dims) != 4:
            raise ScenarioError(f"a Bell tensor has 4 axes [x, y, a, b], got shape {dims}")
        return cls(*dims)

    @property
    def shape(self) -> tuple[int, int, int, int]:
        """Tensor shape ``(m_A, m_B, d_A, d_B)``."""
        return (self.settings_a, self.settings_b, self.outcomes_a, self.outcomes_b)

    @property
    def size(self) -> int:
        """Number of entries of a tensor of this scenario."""
        return int(np.prod(self.shape))

    @property
    def setting_pairs(self) -> int:
        """Number of setting pairs ``m_A * m_B``."""
        return self.settings_a * self.settings_b

    @property
    def local_vertices(self) -> int:
        """Number of deterministic local strategies ``d_A**m_A * d_B**m_B``."""
        return self.outcomes_a**self.settings_a * self.outcomes_b**self.settings_b

    def check_counts(self, counts: ArrayLike) -> NDArray[np.int64]:
        """Return ``counts`` as an int64 array after checking it fits this scenario.

        Raises
        ------
        ScenarioError
            Wrong shape, non-integer values or negative counts.
        """
        arr = np.asarray(counts)
        if arr.shape != self.shape:
            raise ScenarioError(f"counts have shape {arr.shape}, scenario needs {self.shape}")
        if arr.dtype.kind == "f":
            if not np.all(np.isfinite(arr)) or np.any(arr != np.round(arr)):
                raise ScenarioError("counts must be whole numbers")
        elif arr.dtype.kind not in "iub":
            raise ScenarioError(f"counts must be integers, got dtype {arr.dtype}")
        out = arr.astype(np.int64)
        if np.any(out < 0):
            raise ScenarioError("counts must be non-negative")
        return out

    def check_probabilities(
        self, probabilities: ArrayLike, atol: float = 1e-8
    ) -> NDArray[np.float64]:
        """Return ``probabilities`` as float64 after checking shape, sign and normalisation.

        Every setting pair ``(x, y)`` must sum to one over ``(a, b)`` within ``atol``.
        """
        arr = np.asarray(probabilities, dtype=np.float64)
        if arr.shape != self.shape:
            raise ScenarioError(
                f"probabilities have shape {arr.shape}, scenario needs {self.shape}"
            )
        if not np.all(np.isfinite(arr)):
            raise ScenarioError("probabilities must be finite")
        if np.any(arr < -atol):
            raise ScenarioError(f"probabilities must be non-negative (min {arr.min():.3g})")
        sums = arr.sum(axis=(2, 3))
        worst = float(np.max(np.abs(sums - 1.0)))
        if worst > atol:
            raise ScenarioError(
                f"probabilities must sum to 1 for every setting pair (worst deviation {worst:.3g})"
            )
        return arr

    def uniform(self) -> NDArray[np.float64]:
        """The uniform (white-noise) distribution ``1/(d_A d_B)`` for every setting pair."""
        return np.full(self.shape, 1.0 / (self.outcomes_a * self.outcomes_b))

    def __str__(self) -> str:
        return (
            f"{self.settings_a}x{self.settings_b} settings, "
            f"{self.outcomes_a}x{self.outcomes_b} outcomes"
        )
