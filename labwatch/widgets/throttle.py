"""Rate limit for redraws: marks are updated at most ``max_hz`` times a second."""

from __future__ import annotations

import math
import time
from collections.abc import Callable

__all__ = ["MAX_REDRAW_HZ", "Throttle", "check_redraw_hz"]

#: Upper limit of any redraw rate (the Jupyter server drops iopub traffic above ~1000 msg/s
#: and a dashboard sends tens of messages per redraw).
MAX_REDRAW_HZ = 10.0


def check_redraw_hz(hz: float) -> float:
    """``hz`` if it is in ``(0, MAX_REDRAW_HZ]``, else ValueError quoting it."""
    if (
        isinstance(hz, bool)
        or not isinstance(hz, (int, float))
        or not math.isfinite(hz)
        or not 0 < hz <= MAX_REDRAW_HZ
    ):
        raise ValueError(f"redraw rate must be in (0, {MAX_REDRAW_HZ:g}] Hz, got {hz!r}")
    return float(hz)


class Throttle:
    """``ready()`` is True at most once per ``1 / max_hz`` seconds (or when forced).

    Parameters
    ----------
    max_hz : float
        In ``(0, MAX_REDRAW_HZ]``.
    clock : callable
        Monotonic clock in seconds (injectable for tests).
    """

    def __init__(self, max_hz: float = MAX_REDRAW_HZ, clock: Callable[[], float] = time.monotonic):
        self.min_interval_s = 1.0 / check_redraw_hz(max_hz)
        self.clock = clock
        self._last = -math.inf
        self.fired = 0

    def set_rate(self, max_hz: float) -> None:
        """Change the rate limit."""
        self.min_interval_s = 1.0 / check_redraw_hz(max_hz)

    def ready(self, force: bool = False) -> bool:
        """True (and the timer restarts) when a redraw may happen now."""
        now = self.clock()
        if force or now - self._last >= self.min_interval_s:
            self._last = now
            self.fired += 1
            return True
        return False
