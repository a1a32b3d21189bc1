"""LiveMonitor: one Bell value as a large number and a trace over time, live or replayed."""

from __future__ import annotations

import math
from typing import Any

import ipywidgets as w
from traitlets import Bool, Enum, Float, Int, TraitError, Unicode, observe, validate

from labwatch.analysis import AnalysisConfig
from labwatch.engine import EngineConfig
from labwatch.snapshot import Snapshot
from labwatch.widgets._format import DASH, esc, fmt, fmt_assumptions, fmt_count, fmt_pm
from labwatch.widgets.feed import MonitorFeed
from labwatch.widgets.feedview import FeedView
from labwatch.widgets.plot import COLORS, TimePlot
from labwatch.widgets.readout import Readout
from labwatch.widgets.state import SAFETY_CAUTION, functional_info
from labwatch.widgets.throttle import Throttle, check_redraw_hz

__all__ = ["TRACES", "LiveMonitor"]

#: Which Bell value the trace follows: the rolling window or the whole run (cumulative).
TRACES = ("window", "run")


class LiveMonitor(FeedView, w.VBox):
    """A Bell value S(t) with a ±σ band, the local and quantum bounds and a big readout.

    Parameters
    ----------
    endpoint : str, optional
        Publisher endpoint (``tcp://HOST:PORT``) for :meth:`start`.
    trace : {"window", "run"}
        Follow the rolling-window value (responsive, for aligning) or the run's cumulative one.
    window_s, epoch_s : float
        Rolling window and analysis interval, seconds of source clock.
    analysis : AnalysisConfig, optional
    feed : MonitorFeed, optional
        Share an existing data path instead of making one.
    redraw_hz : float
        Most redraws per second (at most 10).

    Notes
    -----
    :meth:`start` creates an asyncio task on the running loop (the notebook kernel's): the
    kernel stays free and other cells run while the monitor updates.  :meth:`replay` feeds a
    recording or a list of messages through the same engine.

    Examples
    --------
    >>> mon = LiveMonitor("tcp://127.0.0.1:5780")   # doctest: +SKIP
    >>> mon                                          # doctest: +SKIP
    >>> mon.start()                                  # doctest: +SKIP
    """

    endpoint = Unicode("", help="Publisher endpoint, tcp://HOST:PORT").tag(sync=True)
    trace = Enum(TRACES, default_value="window", help="Traced value: window or run").tag(sync=True)
    running = Bool(False, help="True while the live task receives").tag(sync=True)
    status = Unicode("idle", help="One-line state of the monitor").tag(sync=True)
    functional = Unicode("", help="Name of the Bell functional shown").tag(sync=True)
    value = Float(None, allow_none=True, help="Latest traced Bell value (None: none yet)").tag(
        sync=True
    )
    stderr = Float(None, allow_none=True, help="Its one-sigma error (fixed n, i.i.d.)").tag(
        sync=True
    )
    local_bound = Float(None, allow_none=True, help="Local bound of the functional").tag(sync=True)
    quantum_bound = Float(None, allow_none=True, help="Quantum maximum when known").tag(sync=True)
    points = Int(0, help="Points in the trace").tag(sync=True)
    trials = Int(0, help="Coincidences in the run so far").tag(sync=True)
    redraw_hz = Float(10.0, help="Most redraws per second (<= 10)").tag(sync=True)

    def __init__(
        self,
        endpoint: str | None = None,
        *,
        trace: str = "window",
        window_s: float = 30.0,
        epoch_s: float = 1.0,
        analysis: AnalysisConfig | None = None,
        feed: MonitorFeed | None = None,
        redraw_hz: float = 10.0,
        history_capacity: int = 1000,
        **kwargs: Any,
    ) -> None:
        if trace not in TRACES:
            raise ValueError(f"trace {trace!r} not in {TRACES}")
        self.feed = feed or MonitorFeed(
            endpoint,
            EngineConfig(window_s=window_s, epoch_s=epoch_s, analysis=analysis or AnalysisConfig()),
            history_capacity=history_capacity,
        )
        self._throttle = Throttle(check_redraw_hz(redraw_hz))
        self.readout = Readout(caption="Bell value", size="huge")
        self.plot = TimePlot("Bell value over time", "Bell value", height="320px")
        self.plot.add_band("band", COLORS["blue"], opacity=0.25)
        self.plot.add_line("value", COLORS["blue"], "S (±1σ band)")
        self.plot.add_hline("local", COLORS["vermillion"], "local bound")
        self.plot.add_hline("quantum", COLORS["green"], "quantum max", style="dotted")
        self.header = w.HTML()
        self.footer = w.HTML()
        super().__init__(
            children=[self.header, self.readout, self.plot.figure, self.footer], **kwargs
        )
        self.layout.border = "1px solid #bbb"
        self.layout.padding = "6px"
        self.redraw_hz = redraw_hz
        self.trace = trace
        self.endpoint = self.feed.endpoint or ""
        self._drawn_version = -1
        self.feed.add_listener(self._on_feed)
        self.redraw()

    @validate("redraw_hz")
    def _validate_redraw_hz(self, proposal):
        try:
            hz = check_redraw_hz(proposal["value"])
        except ValueError as exc:
            raise TraitError(str(exc)) from None
        if hasattr(self, "_throttle"):
            self._throttle.set_rate(hz)
        return hz

    @observe("trace")
    def _trace_changed(self, change) -> None:
        if hasattr(self, "_drawn_version"):
            self._drawn_version = -1  # the other series: redraw the marks
            self.redraw()

    # ------------------------------------------------------------------ control
    def start(self) -> None:
        """Start receiving from :attr:`endpoint` on the running asyncio loop."""
        self.feed.start(self.endpoint or None)
        self.running = True
        self.redraw()

    def stop(self) -> None:
        """Stop receiving (within a tenth of a second); the figures stay."""
        self.feed.stop()

    # ------------------------------------------------------------------ drawing
    def _on_feed(self, feed: MonitorFeed, force: bool) -> None:
        if self._throttle.ready(force):
            self.redraw()

    def redraw(self) -> None:
        """Bring traits, readout and marks up to date with the feed (call at ≤ 10 Hz)."""
        feed = self.feed
        snap = feed.latest
        h = feed.history
        key = "bell_window" if self.trace == "window" else "bell"
        bell = None if snap is None else (snap.bell_window if self.trace == "window" else snap.bell)
        name, local, quantum = functional_info(snap)
        self.running = feed.running
        with self.hold_sync():
            self.functional = name
            self.value = _finite_or_none(None if bell is None else bell.value)
            self.stderr = _finite_or_none(None if bell is None else bell.stderr)
            self.local_bound = local
            self.quantum_bound = quantum
            self.trials = 0 if snap is None else int(snap.trials)
            self.status = self._status_text(feed, snap)
        if h.version != self._drawn_version:
            t = h.time()
            v, e = h.series(key), h.series(key + "_err")
            span = (float(t[0]), float(t[-1])) if t.size else (0.0, 1.0)
            with self.plot.hold():
                self.plot.set_band("band", t, v - e, v + e)
                self.plot.set_line("value", t, v)
                self.plot.set_hline("local", local, span)
                self.plot.set_hline("quantum", quantum, span)
            self._drawn_version = h.version
            self.points = self.plot.points("value")
        self._draw_text(snap, bell, name, local, quantum)

    def _status_text(self, feed: MonitorFeed, snap: Snapshot | None) -> str:
        if feed.error:
            return feed.error
        if feed.mode == "replay":
            return f"replaying ({feed.replayed} messages)"
        if feed.running:
            return "live" if snap is not None else "live, waiting for the first analysis epoch"
        return "not receiving (last figures shown)" if snap is not None else "idle"

    def _draw_text(self, snap, bell, name, local, quantum) -> None:
        which = "rolling window" if self.trace == "window" else "whole run"
        window = f" of {snap.window_s:g} s" if (snap is not None and self.trace == "window") else ""
        margin = None if bell is None else bell.margin_sigma
        tone = "idle"
        if margin is not None and math.isfinite(margin):
            tone = "ok" if margin >= 3 else "warn"
        with self.readout.hold_sync():
            self.readout.caption = f"{name or 'Bell value'} · {which}{window}"
            self.readout.text = fmt(None if bell is None else bell.value, ".3f")
            self.readout.detail = (
                f"± {fmt(None if bell is None else bell.stderr, '.3f')} (1σ) · "
                f"local bound {fmt(local, 'g')} · quantum max {fmt(quantum, '.3f')} · "
                f"{fmt(margin, '.1f')} σ above local"
            )
            self.readout.assumptions = "" if bell is None else fmt_assumptions(bell.assumptions)
            self.readout.tone = tone
        run = DASH if snap is None else f"{esc(snap.run)} (#{snap.run_index})"
        self.header.value = (
            '<div style="font-size:18px"><b>labwatch · live Bell value</b> &nbsp; '
            f'<span style="color:#555">{esc(self.endpoint or "no endpoint")} · {esc(self.status)}'
            f" · run {run} · {fmt_count(self.trials)} coincidences</span></div>"
        )
        settings = ""
        if snap is not None and not snap.random_settings:
            settings = (
                "<b>Settings held in blocks: this data cannot test local realism</b> "
                "(the value describes the correlations only). "
            )
        self.footer.value = (
            f'<div style="font-size:13px;color:#444">{settings}Band: ±1σ, '
            f"{esc(fmt_pm(self.value, self.stderr))}. {esc(SAFETY_CAUTION)}</div>"
        )


def _finite_or_none(v: float | None) -> float | None:
    return float(v) if v is not None and math.isfinite(v) else None
