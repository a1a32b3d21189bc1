"""Immutable snapshots: what every view (console, widgets, reports, JSON) reads.

A :class:`Snapshot` is made by the engine at each analysis epoch.  It holds the counts and
every figure with its uncertainty and the labels of the assumptions behind it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields, is_dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from labwatch.bell import BellValue
from labwatch.scenario import Scenario

__all__ = ["Figure", "RejectionNote", "StreamHealth", "RateFigures", "Snapshot", "to_jsonable"]


@dataclass(frozen=True)
class Figure:
    """A number shown to the user, with its uncertainty and assumptions.

    Attributes
    ----------
    name : str
        What the number is (e.g. ``"visibility"``).
    value : float
    stderr : float
        One-sigma uncertainty (``nan`` when not available).
    low, high : float
        An interval when one is reported (``nan`` otherwise), at ``confidence_level``.
    assumptions : tuple of str
        Labels such as ``"i.i.d."``, ``"fair sampling"``, ``"fixed n"``, ``"stopping-safe"``.
    """

    name: str
    value: float
    stderr: float = math.nan
    low: float = math.nan
    high: float = math.nan
    confidence_level: float = math.nan
    assumptions: tuple[str, ...] = ()
    note: str = ""


@dataclass(frozen=True)
class RejectionNote:
    """One rejected message: when (monitor wall clock, s), why, and a short detail."""

    received_wall: float
    reason: str
    detail: str


@dataclass(frozen=True)
class StreamHealth:
    """Transport-level health of the stream (counts since the monitor started)."""

    messages: int
    accepted: int
    rejected: int
    rejections_by_reason: tuple[tuple[str, int], ...]
    recent_rejections: tuple[RejectionNote, ...]
    gaps: int
    missing: int
    missed_at_start: int
    late: int
    duplicates: int
    restarts: int
    clock_jumps: int
    heartbeats: int
    source_state: str | None
    last_message_wall: float | None
    last_heartbeat_wall: float | None


@dataclass(frozen=True)
class RateFigures:
    """Rates over the rolling window (Hz, source clock) and derived alignment figures.

    ``heralding_a`` is coincidences / Bob's singles (Alice's heralding efficiency, Klyshko),
    ``heralding_b`` coincidences / Alice's singles; ``accidentals_hz`` is
    ``R_A R_B tau`` with ``tau`` the coincidence window (common practice, no source).
    """

    coincidence_hz: float
    coincidence_hz_stderr: float
    singles_a_hz: float | None
    singles_b_hz: float | None
    accidentals_hz: float | None
    heralding_a: float | None
    heralding_b: float | None


@dataclass(frozen=True, eq=False)
class Snapshot:
    """Everything known at the end of one analysis epoch of one run.

    Attributes
    ----------
    epoch : int
        Analysis epoch counter (0, 1, ...) over the monitor's lifetime.
    source, run : str
        Source and run id; ``run_index`` counts runs seen by this monitor (0, 1, ...).
    scenario : Scenario
    t_start, t_stop : float
        Source-clock span of the run so far (s); ``window_s`` the rolling window length.
    counts, window_counts : ndarray (m_A, m_B, d_A, d_B), read-only
        Cumulative counts of the run and of the rolling window.
    trials, window_trials : int
    random_settings : bool
        The run delivers per-trial random settings (only then can local realism be tested).
    functional : str
        Name of the Bell functional the figures ``bell`` / ``bell_window`` use.
    bell, bell_window : BellValue or None
        Bell value of the run and of the window with delta-method errors (fixed n).
    correlators : ndarray (m_A, m_B) or None
        ``E_xy`` for two-outcome parties; ``correlator_errors`` their standard errors.
    contrast : ndarray (m_A, m_B)
        Correlation contrast per setting pair, ``(P_k - 1/d)/(1 - 1/d)`` with ``P_k`` the
        largest probability of ``b = a + k (mod d)`` (fringe visibility for qubits).
    figures : tuple of Figure
        Further figures (visibility, evidence, confidence bounds, ...), by name.
    extras : dict
        Structured results of the analyses (certificate, best pair, target, ...), JSON-able.
    health : StreamHealth
    """

    epoch: int
    source: str
    run: str
    run_index: int
    scenario: Scenario
    t_start: float
    t_stop: float
    window_s: float
    counts: NDArray[np.int64]
    window_counts: NDArray[np.int64]
    trials: int
    window_trials: int
    live_time_s: float
    random_settings: bool
    functional: str
    bell: BellValue | None
    bell_window: BellValue | None
    correlators: NDArray[np.float64] | None
    correlator_errors: NDArray[np.float64] | None
    contrast: NDArray[np.float64]
    rates: RateFigures
    figures: tuple[Figure, ...]
    health: StreamHealth
    extras: dict[str, Any] = field(default_factory=dict)

    def figure(self, name: str) -> Figure | None:
        """The figure called ``name``, or None."""
        for f in self.figures:
            if f.name == name:
                return f
        return None

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able dict of the snapshot (arrays as nested lists, NaN as None)."""
        return to_jsonable(self)


def to_jsonable(obj: Any) -> Any:
    """Convert dataclasses, arrays and non-finite floats into plain JSON values."""
    if is_dataclass(obj) and not isinstance(obj, type):
        if isinstance(obj, Scenario):
            return {
                "settings": [obj.settings_a, obj.settings_b],
                "outcomes": [obj.outcomes_a, obj.outcomes_b],
            }
        return {f.name: to_jsonable(getattr(obj, f.name)) for f in fields(obj)}
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        return v if math.isfinite(v) else None
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    return obj
