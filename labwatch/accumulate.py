"""Accumulation of counts: per-run cumulative totals and a rolling time window.

Pure and vectorised: every update is O(tensor size), independent of the number of trials.
Times are source-clock seconds from the message headers.

:class:`RunAccumulator` defers the array work: consecutive increments that fall in the same
window bin are kept in a short list and summed in one numpy call when the bin changes, the
list is full, or anyone reads ``counts`` or ``window`` (so readers always see every message).
At tens of thousands of small messages per second this removes most of the per-message cost.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from labwatch.hist_block import HistBlock
from labwatch.protocol import CountBatch
from labwatch.scenario import Scenario

__all__ = ["MAX_PENDING", "RollingCounts", "RunAccumulator"]


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


#: Largest number of increments held back before they are summed (bounds the memory).
MAX_PENDING = 512


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
        self._counts = np.zeros(scenario.shape, dtype=np.int64)
        self._window = RollingCounts(scenario.shape, window_s)
        self._bin_width = self._window.bin_width
        self._window_s = self._window.window_s
        # increments not yet folded in, all in window bin ``_pend_index``
        self._pend: list[NDArray[np.int64]] = []
        self._pend_n = 0  # messages in _pend (an entry may be the sum of a run of them)
        self._pend_index: int | None = None
        self._pend_t_stop = 0.0
        self._pend_live = 0.0
        self._pend_singles = [0, 0]
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

    @property
    def counts(self) -> NDArray[np.int64]:
        """Cumulative counts of the run, shape (m_A, m_B, d_A, d_B), int64."""
        if self._pend:
            self.flush()
        return self._counts

    @property
    def window(self) -> RollingCounts:
        """The rolling window (every added batch included)."""
        if self._pend:
            self.flush()
        return self._window

    def flush(self) -> None:
        """Fold the held-back increments into the totals and the window now."""
        pend = self._pend
        if not pend:
            return
        total = pend[0] if len(pend) == 1 else np.add.reduce(np.stack(pend))
        self._counts += total
        self._window.add(
            total,
            self._pend_t_stop,
            self._pend_live,
            (self._pend_singles[0], self._pend_singles[1]),
        )
        self._pend = []
        self._pend_n = 0
        self._pend_index = None
        self._pend_live = 0.0
        self._pend_singles = [0, 0]

    def add(self, batch: CountBatch, late: bool = False) -> None:
        """Fold one accepted batch into the run (the batch's scenario must match).

        ``late`` marks a message that arrived out of order (its sequence number filled a gap):
        its older timestamps are expected and are not taken for a clock jump.
        """
        prev = self._t_prev
        t_stop = batch.t_stop
        if late:
            pass
        elif prev is not None and t_stop < prev - self._bin_width:
            # source clock went backwards: keep cumulative counts, restart the window
            self.flush()
            self.clock_jumps_backward += 1
            self._window.reset()
        elif prev is not None and batch.t_start > prev + self._window_s:
            # forward by more than a window: nothing in the window is recent any more
            self.flush()
            self.clock_jumps_forward += 1
            self._window.reset()
        if not late:
            self._t_prev = t_stop
        live = max(0.0, t_stop - batch.t_start)
        index = math.floor(t_stop / self._bin_width)
        if index != self._pend_index or self._pend_n >= MAX_PENDING:
            self.flush()
            self._pend_index = index
        self._pend.append(batch.counts)
        self._pend_n += 1
        self._pend_t_stop = t_stop
        self._pend_live += live
        if batch.singles is not None:
            sa, sb = sum(batch.singles[0]), sum(batch.singles[1])
            self._pend_singles[0] += sa
            self._pend_singles[1] += sb
            self.singles = (self.singles[0] + sa, self.singles[1] + sb)
            self.has_singles = True
        self.messages += 1
        self.trials += batch.trials
        self.live_time_s += live
        if batch.coincidence_window_s is not None:
            self.coincidence_window_s = batch.coincidence_window_s
        self.no_click = self.no_click or batch.no_click
        if batch.random_settings:
            self.random_settings = True
            if self.messages == 1 or self.setting_probabilities is None:
                self.setting_probabilities = batch.setting_probabilities
        else:
            self.block_settings = True
        if self.t_first is None or batch.t_start < self.t_first:
            self.t_first = batch.t_start
        if self.t_last is None or t_stop > self.t_last:
            self.t_last = t_stop

    # ------------------------------------------------------------------ blocks
    def steady_prefix(self, block: HistBlock) -> int:
        """How many leading messages of ``block`` :meth:`add_block` may take.

        A message that would be seen as a clock jump by :meth:`add` (and the messages after
        it) must go through :meth:`add` instead; so must everything before this run has a
        previous message.
        """
        prev = self._t_prev
        if prev is None:
            return 0
        t0, t1 = block.t_start, block.t_stop
        before = np.empty(len(t1))
        before[0] = prev
        before[1:] = t1[:-1]
        jump = (np.asarray(t1) < before - self._bin_width) | (
            np.asarray(t0) > before + self._window_s
        )
        return int(np.argmax(jump)) if jump.any() else len(t1)

    def add_block(self, block: HistBlock, start: int, stop: int) -> None:
        """Fold messages ``start:stop`` of ``block`` in; the same as :meth:`add` on each.

        The messages must come from :meth:`steady_prefix` (in order, no clock jump).  Window
        bins, the held-back increments and every float sum follow :meth:`add` message by
        message, so the totals are bit-for-bit those of the one-at-a-time path.
        """
        if stop <= start:
            return
        sig = block.signature
        t0s, t1s = block.t_start[start:stop], block.t_stop[start:stop]
        bw = self._bin_width
        lives = [max(0.0, t1 - t0) for t0, t1 in zip(t0s, t1s)]
        g0 = start  # first message of the bin run not yet in _pend
        for k, t1 in enumerate(t1s, start):
            index = math.floor(t1 / bw)
            if index != self._pend_index or self._pend_n >= MAX_PENDING:
                if k > g0:
                    self._hold(block, g0, k, lives[g0 - start : k - start])
                self.flush()
                self._pend_index = index
                g0 = k
            self._pend_n += 1
        self._hold(block, g0, stop, lives[g0 - start :])
        live_total = self.live_time_s
        for live in lives:  # one message after the other, as add() sums them
            live_total += live
        self.live_time_s = live_total
        self._t_prev = t1s[-1]
        # Python integers: a long block of big counts can pass int64 (add() never wraps)
        if block.singles is not None:
            sa, sb = _int_sums(block.singles[start:stop])
            self.singles = (self.singles[0] + sa, self.singles[1] + sb)
            self.has_singles = True
        self.messages += stop - start
        self.trials += sum(block.trials[start:stop].tolist())
        if sig.coincidence_window_s is not None:
            self.coincidence_window_s = sig.coincidence_window_s
        self.no_click = self.no_click or sig.no_click
        self.block_settings = True
        first, last = min(t0s), max(t1s)
        if self.t_first is None or first < self.t_first:
            self.t_first = first
        if self.t_last is None or last > self.t_last:
            self.t_last = last

    def _hold(self, block: HistBlock, start: int, stop: int, lives: list[float]) -> None:
        """Put block messages ``start:stop`` (one window bin; ``lives`` their live times) in
        the held-back increments."""
        rows = block.counts[start:stop]
        pairs = block.pair_index[start:stop]
        sc = block.signature.scenario
        total = np.zeros((sc.settings_a * sc.settings_b, rows.shape[1]), dtype=np.int64)
        if (pairs == pairs[0]).all():
            total[pairs[0]] = rows.sum(axis=0)
        else:
            np.add.at(total, pairs, rows)
        self._pend.append(total.reshape(self._counts.shape))
        self._pend_t_stop = block.t_stop[stop - 1]
        pend_live = self._pend_live
        for live in lives:
            pend_live += live
        self._pend_live = pend_live
        if block.singles is not None:
            sa, sb = _int_sums(block.singles[start:stop])
            self._pend_singles[0] += sa
            self._pend_singles[1] += sb


def _int_sums(singles: NDArray[np.int64]) -> tuple[int, int]:
    """Column sums of an (n, 2) singles block as Python integers."""
    a, b = singles.T.tolist()
    return sum(a), sum(b)
