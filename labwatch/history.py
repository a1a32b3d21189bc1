"""Bounded, decimating history of the scalar figures of a run, for plots over time (pure).

:class:`History` keeps one row of named scalar series per stored snapshot, with the source
clock as its time axis.  Memory is bounded: when ``capacity`` rows are stored, every other row
is dropped and from then on only every second offered snapshot is stored (the *stride*
doubles), so the stored points stay evenly spaced over the whole run.  The latest offered
snapshot is always available as the *tail*, so a plot ends at the current value even when that
snapshot falls between stored rows.

A history holds one run segment: a snapshot of another run (a source restart or a new run
started by hand) clears it, because cumulative figures restart there.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np
from numpy.typing import NDArray

from labwatch.snapshot import Snapshot

__all__ = ["SERIES", "P_VALUE_FLOOR", "History", "neg_log10_p", "series_values"]

#: Names of the series extracted from a snapshot (``nan`` where a figure is absent).
SERIES: tuple[str, ...] = (
    "bell",
    "bell_err",
    "bell_window",
    "bell_window_err",
    "margin_sigma",
    "visibility",
    "visibility_low",
    "visibility_high",
    "best_pair_visibility",
    "neg_log10_p",
    "bell_lcb",
    "no_signalling_p",
    "coincidence_hz",
    "coincidence_hz_err",
    "singles_a_hz",
    "singles_b_hz",
    "accidentals_hz",
    "heralding_a",
    "heralding_b",
    "trials",
)

#: p-values below this are shown as this (−log10 p is capped at 300).
P_VALUE_FLOOR = 1e-300


def neg_log10_p(p: float | None) -> float:
    """``-log10(p)`` with ``p`` clipped to ``[P_VALUE_FLOOR, 1]``; ``nan`` for a missing p."""
    if p is None or not isinstance(p, (int, float, np.floating)) or math.isnan(p):
        return math.nan
    return -math.log10(min(max(float(p), P_VALUE_FLOOR), 1.0))


def _num(v: object) -> float:
    if v is None or isinstance(v, bool):
        return math.nan
    try:
        return float(v)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return math.nan


def series_values(snapshot: Snapshot) -> dict[str, float]:
    """The scalar figures of one snapshot, keyed by the names in :data:`SERIES`.

    ``visibility_low``/``visibility_high`` are the reported interval when there is one, else
    ``value ± stderr``.  ``neg_log10_p`` is ``-log10`` of the ``"p_value"`` figure.  Missing
    figures give ``nan``.
    """
    out = dict.fromkeys(SERIES, math.nan)
    b, bw = snapshot.bell, snapshot.bell_window
    if b is not None:
        out["bell"], out["bell_err"] = _num(b.value), _num(b.stderr)
        out["margin_sigma"] = _num(b.margin_sigma)
    if bw is not None:
        out["bell_window"], out["bell_window_err"] = _num(bw.value), _num(bw.stderr)
    vis = snapshot.figure("visibility")
    if vis is not None:
        v, err = _num(vis.value), _num(vis.stderr)
        lo, hi = _num(vis.low), _num(vis.high)
        if math.isnan(lo) or math.isnan(hi):
            lo, hi = v - err, v + err
        out["visibility"], out["visibility_low"], out["visibility_high"] = v, lo, hi
    best = snapshot.extras.get("best_pair")
    if isinstance(best, Mapping):
        out["best_pair_visibility"] = _num(best.get("visibility"))
    p = snapshot.figure("p_value")
    if p is not None:
        out["neg_log10_p"] = neg_log10_p(p.value)
    lcb = snapshot.figure("bell_lcb")
    if lcb is not None:
        out["bell_lcb"] = _num(lcb.value)
    ns = snapshot.figure("no_signalling_p")
    if ns is not None:
        out["no_signalling_p"] = _num(ns.value)
    r = snapshot.rates
    out["coincidence_hz"] = _num(r.coincidence_hz)
    out["coincidence_hz_err"] = _num(r.coincidence_hz_stderr)
    out["singles_a_hz"] = _num(r.singles_a_hz)
    out["singles_b_hz"] = _num(r.singles_b_hz)
    out["accidentals_hz"] = _num(r.accidentals_hz)
    out["heralding_a"] = _num(r.heralding_a)
    out["heralding_b"] = _num(r.heralding_b)
    out["trials"] = float(snapshot.trials)
    return out


class History:
    """Evenly decimated time series of one run segment.

    Parameters
    ----------
    capacity : int
        Most rows stored (even, >= 4).  Memory is ``capacity * (len(SERIES) + 1)`` floats.

    Attributes
    ----------
    stride : int
        Only offered snapshots whose index within the run is a multiple of ``stride`` are
        stored (1 until the first halving, then 2, 4, ...).
    offered : int
        Snapshots offered in this run segment.
    run_key : tuple or None
        ``(source, run, run_index)`` of the segment held.

    Examples
    --------
    >>> h = History(capacity=4)
    >>> for k in range(9):
    ...     _ = h.append_values(float(k), {"bell": 2.0 + k / 10})
    >>> h.stride, len(h), h.time().tolist()
    (4, 3, [0.0, 4.0, 8.0])
    """

    def __init__(self, capacity: int = 1000) -> None:
        if (
            isinstance(capacity, bool)
            or not isinstance(capacity, (int, np.integer))
            or capacity < 4
            or capacity % 2
        ):
            raise ValueError(f"capacity must be an even integer >= 4, got {capacity!r}")
        self.capacity = int(capacity)
        self.names = SERIES
        self._col = {name: i for i, name in enumerate(SERIES)}
        self._t = np.empty(self.capacity, dtype=np.float64)
        self._data = np.empty((self.capacity, len(SERIES)), dtype=np.float64)
        self._tail_t = math.nan
        self._tail = np.full(len(SERIES), np.nan)
        self.clear()

    def clear(self, run_key: tuple | None = None) -> None:
        """Forget every point (and start a segment for ``run_key``)."""
        self._n = 0
        self.stride = 1
        self.offered = 0
        self.halvings = 0
        self._has_tail = False
        self.run_key = run_key
        self.version = getattr(self, "version", 0) + 1

    def __len__(self) -> int:
        """Stored rows (the tail not included)."""
        return self._n

    @property
    def points(self) -> int:
        """Points a plot shows: the stored rows plus the tail when it is not stored."""
        return self._n + int(self._has_tail)

    def append(self, snapshot: Snapshot) -> bool:
        """Offer a snapshot; returns True when it was stored as a row (not only as the tail).

        The time of the point is ``t_stop - t_start``: source seconds since the run began.
        A snapshot of another run segment clears the history first.
        """
        key = (snapshot.source, snapshot.run, snapshot.run_index)
        if key != self.run_key:
            self.clear(key)
        t = snapshot.t_stop - snapshot.t_start
        return self.append_values(t, series_values(snapshot))

    def append_values(self, t: float, values: Mapping[str, float]) -> bool:
        """Offer one point at time ``t`` (s); names not in :data:`SERIES` raise ValueError."""
        row = np.full(len(SERIES), np.nan)
        for name, v in values.items():
            if name not in self._col:
                raise ValueError(f"unknown series {name!r}; known: {SERIES}")
            row[self._col[name]] = _num(v)
        index = self.offered
        self.offered += 1
        self.version += 1
        if index % self.stride:
            self._tail_t, self._tail[:] = float(t), row
            self._has_tail = True
            return False
        if self._n == self.capacity:
            keep = self._n // 2
            self._t[:keep] = self._t[: self._n : 2]
            self._data[:keep] = self._data[: self._n : 2]
            self._n = keep
            self.stride *= 2
            self.halvings += 1
            if index % self.stride:
                self._tail_t, self._tail[:] = float(t), row
                self._has_tail = True
                return False
        self._t[self._n] = float(t)
        self._data[self._n] = row
        self._n += 1
        self._has_tail = False
        return True

    def time(self) -> NDArray[np.float64]:
        """Times of the shown points (s since the run began), tail included; a copy."""
        if self._has_tail:
            return np.append(self._t[: self._n], self._tail_t)
        return self._t[: self._n].copy()

    def series(self, name: str) -> NDArray[np.float64]:
        """Values of series ``name`` at :meth:`time` (``nan`` where absent); a copy."""
        if name not in self._col:
            raise ValueError(f"unknown series {name!r}; known: {SERIES}")
        col = self._col[name]
        if self._has_tail:
            return np.append(self._data[: self._n, col], self._tail[col])
        return self._data[: self._n, col].copy()

    def latest(self, name: str) -> float:
        """The most recent value of series ``name`` (``nan`` when empty or absent)."""
        if name not in self._col:
            raise ValueError(f"unknown series {name!r}; known: {SERIES}")
        if self._has_tail:
            return float(self._tail[self._col[name]])
        if self._n == 0:
            return math.nan
        return float(self._data[self._n - 1, self._col[name]])
