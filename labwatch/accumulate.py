"""Accumulation of counts: per-run cumulative totals and a rolling time window.

Pure and vectorised: every update is O(tensor size), independent of the number of trials.
Times are source-clock seconds from the message headers.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from labwatch.protocol import CountBatch
from labwatch.scenario import Scenario

__all__ = ["RollingCounts", "RunAccumulator"]


class RollingCounts:
    """Counts of the last ``window_s`` seconds of source time, in a ring of time bins.

    The window is quantised to bins of ``window_s / bins`` seconds: a message counts in the bin
    holding its ``t_stop``, and a bin leaves the window as a whole.  Memory is ``bins`` tensors,
    whatever the message rate.

    Parameters
    ----------
    shape : tuple
        Counts tensor shape ``(m_A, m_B, d_A, d_B)``.
    window_s : float
        Window length in seconds (source clock), > 0.
    bins : int
        Number of bins in the ring.
    """

    def __init__(self, shape: tuple[int, ...], window_s: float, bins: int = 50) -> None:
        if not (window_s > 0 and math.isfinite(window_s)):
            raise ValueError(f"window_s must be a positive number of seconds, got {window_s!r}")
        self.shape = tuple(shape)
        self.window_s = float(window_s)
        self.bins = int(bins)
        self.bin_width = self.window_s / self.bins
        self._ring = np.zeros((self.bins,) + self.shape, dtype=np.int64)
        self._singles = np.zeros((self.bins, 2), dtype=np.int64)
        self._live = np.zeros(self.bins)
        self.total = np.zeros(self.shape, dtype=np.int64)
        self._head: int | None = None  # absolute bin index of the newest bin

    def reset(self) -> None:
        """Empty the window (e.g. after a backward clock jump)."""
        self._ring[:] = 0
        self._singles[:] = 0
        self._live[:] = 0
        self.total[:] = 0
        self._head = None

    def _advance(self, index: int) -> None:
        if self._head is None:
            self._head = index
            return
        if index <= self._head:
            return
        steps = index - self._head
        if steps >= self.bins:
            self._ring[:] = 0
            self._singles[:] = 0
            self._live[:] = 0
            self.total[:] = 0
        else:
            for k in range(self._head + 1, index + 1):
                slot = k % self.bins
                self.total -= self._ring[slot]
                self._ring[slot] = 0
                self._singles[slot] = 0
                self._live[slot] = 0
        self._head = index

    def add(
        self,
        counts: NDArray[np.int64],
        t_stop: float,
        live_s: float = 0.0,
        singles: tuple[int, int] = (0, 0),
    ) -> None:
        """Add one increment whose accumulation window ended at ``t_stop``."""
        index = math.floor(t_stop / self.bin_width)
        self._advance(index)
        assert self._head is not None
        if index <= self._head - self.bins:
            return  # older than the whole window
        slot = index % self.bins
        self._ring[slot] += counts
        self.total += counts
        self._live[slot] += live_s
        self._singles[slot] += singles

    @property
    def live_time_s(self) -> float:
        """Summed accumulation time of the messages in the window (s)."""
        return float(self._live.sum())

    @property
    def singles_total(self) -> tuple[int, int]:
        """Singles counts (Alice, Bob) in the window."""
        s = self._singles.sum(axis=0)
        return int(s[0]), int(s[1])


class RunAccumulator:
    """Cumulative counts of one run of one source, plus its rolling window.

    Attributes
    ----------
    counts : ndarray (m_A, m_B, d_A, d_B) int64
        Cumulative coincidence counts of the run.
    live_time_s : float
        Summed accumulation windows ``t_stop - t_start`` (s).
    singles : (int, int)
        Cumulative singles (summed over each party's detectors).
    random_settings : bool
        True once the run delivered per-trial events.
    clock_jumps : int
        Discontinuities of the source clock seen in this run: ``clock_jumps_backward`` (a
        message ending more than one window bin before the previous one) plus
        ``clock_jumps_forward`` (a message starting more than ``window_s`` after the previous
        one ended).  Each empties the rolling window; cumulative counts are kept.
    """

    def __init__(
        self,
        source: str,
        run: str,
        scenario: Scenario,
        window_s: float,
        started_at: float,
        index: int = 0,
    ) -> None:
        self.source = source
        self.run = run
        self.scenario = scenario
        self.index = index
        self.started_at = started_at
        self.counts = np.zeros(scenario.shape, dtype=np.int64)
        self.window = RollingCounts(scenario.shape, window_s)
        self.messages = 0
        self.trials = 0
        self.live_time_s = 0.0
        self.singles = (0, 0)
        self.has_singles = False
        self.coincidence_window_s: float | None = None
        self.no_click = False
        self.t_first: float | None = None
        self.t_last: float | None = None
        self.random_settings = False
        self.block_settings = False
        self.setting_probabilities: NDArray[np.float64] | None = None
        self.clock_jumps_backward = 0
        self.clock_jumps_forward = 0
        self._t_prev: float | None = None  # t_stop of the previous message (jump detection)

    @property
    def clock_jumps(self) -> int:
        """Backward plus forward source-clock jumps in this run."""
        return self.clock_jumps_backward + self.clock_jumps_forward

    def add(self, batch: CountBatch) -> None:
        """Fold one accepted batch into the run (the batch's scenario must match)."""
        prev = self._t_prev
        if prev is not None and batch.t_stop < prev - self.window.bin_width:
            # source clock went backwards: keep cumulative counts, restart the window
            self.clock_jumps_backward += 1
            self.window.reset()
        elif prev is not None and batch.t_start > prev + self.window.window_s:
            # forward by more than a window: nothing in the window is recent any more
            self.clock_jumps_forward += 1
            self.window.reset()
        self._t_prev = batch.t_stop
        live = max(0.0, batch.t_stop - batch.t_start)
        singles = (0, 0)
        if batch.singles is not None:
            singles = (sum(batch.singles[0]), sum(batch.singles[1]))
            self.singles = (self.singles[0] + singles[0], self.singles[1] + singles[1])
            self.has_singles = True
        self.counts += batch.counts
        self.window.add(batch.counts, batch.t_stop, live, singles)
        self.messages += 1
        self.trials += batch.trials
        self.live_time_s += live
        if batch.coincidence_window_s is not None:
            self.coincidence_window_s = batch.coincidence_window_s
        self.no_click = self.no_click or batch.no_click
        if batch.random_settings:
            self.random_settings = True
            if batch.setting_probabilities is not None:
                self.setting_probabilities = batch.setting_probabilities
        else:
            self.block_settings = True
        self.t_first = batch.t_start if self.t_first is None else min(self.t_first, batch.t_start)
        self.t_last = batch.t_stop if self.t_last is None else max(self.t_last, batch.t_stop)
