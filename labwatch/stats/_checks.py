"""Input checks shared by the statistics modules (private)."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "StatsError",
    "check_level",
    "check_option",
    "check_setting_probabilities",
]


class StatsError(ValueError):
    """Bad input to a statistics routine (the message quotes the offending value)."""


def check_option(name: str, value: object, allowed: Sequence[str]) -> str:
    """Return ``value`` if it is one of ``allowed``, else raise quoting both."""
    if not isinstance(value, str) or value not in allowed:
        raise StatsError(f"{name} must be one of {tuple(allowed)!r}, got {value!r}")
    return value


def check_level(name: str, value: object) -> float:
    """A probability level strictly between 0 and 1 (a significance level or p-value target)."""
    try:
        v = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise StatsError(f"{name} must be a number in (0, 1), got {value!r}") from None
    if not (0.0 < v < 1.0) or math.isnan(v):
        raise StatsError(f"{name} must be in (0, 1), got {value!r}")
    return v


def check_setting_probabilities(
    setting_probabilities: ArrayLike,
    shape: tuple[int, int] | None = None,
    *,
    strictly_positive: bool = True,
    atol: float = 1e-9,
) -> NDArray[np.float64]:
    """Validate a setting distribution ``q[x, y]`` of shape ``(m_A, m_B)`` summing to one.

    Parameters
    ----------
    setting_probabilities : array_like, shape (m_A, m_B)
    shape : (int, int), optional
        Required shape (the functional's setting counts).
    strictly_positive : bool
        Require ``q > 0`` everywhere (a random-setting test divides by ``q``).
    atol : float
        Tolerance of the normalisation check.
    """
    q = np.array(setting_probabilities, dtype=np.float64, copy=True)
    if q.ndim != 2:
        raise StatsError(f"setting probabilities need shape (m_A, m_B), got shape {q.shape}")
    if shape is not None and q.shape != tuple(shape):
        raise StatsError(f"setting probabilities have shape {q.shape}, functional needs {shape}")
    if not np.all(np.isfinite(q)):
        raise StatsError(f"setting probabilities must be finite, got {q.tolist()!r}")
    if strictly_positive and np.any(q <= 0):
        raise StatsError(
            f"every setting pair needs probability > 0 for a random-setting test, got {q.tolist()!r}"
        )
    if np.any(q < 0):
        raise StatsError(f"setting probabilities must be non-negative, got {q.tolist()!r}")
    total = float(q.sum())
    if abs(total - 1.0) > atol:
        raise StatsError(f"setting probabilities must sum to 1, got sum {total!r}")
    q /= total
    q.setflags(write=False)
    return q
