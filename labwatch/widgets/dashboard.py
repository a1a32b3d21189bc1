"""The bench dashboard: every panel, the controls and the target banner over one data path.

Changing the functional, the rolling window or the confidence target starts a **new run
segment** (cumulative counts restart; the stream and any recording go on, the recording gets
a ``new_run`` marker).  Every figure on screen then comes from one analysis configuration, and
no functional or target picked after looking at data is tested on that same data, which
would void the stopping-safe guarantees.
"""

from __future__ import annotations

import asyncio
import functools
import math
import time
from collections.abc import Mapping
from dataclasses import replace
from typing import Any

import ipywidgets as w
from traitlets import Bool, Dict, Float, TraitError, Unicode, observe, validate

from labwatch.analysis import AnalysisConfig
from labwatch.bell import BellFunctional
from labwatch.control import send_command
from labwatch.engine import EngineConfig
from labwatch.transport import check_endpoint
from labwatch.widgets._format import esc, fmt, fmt_count
from labwatch.widgets.alignment_panel import AlignmentPanel
from labwatch.widgets.banner import TargetBanner
from labwatch.widgets.bell_panel import BellPanel
from labwatch.widgets.controls import FUNCTIONAL_LABELS, ControlBar
from labwatch.widgets.evidence_panel import EvidencePanel
from labwatch.widgets.feed import MonitorFeed
from labwatch.widgets.feedview import FeedView
from labwatch.widgets.health_panel import HealthPanel
from labwatch.widgets.margin_panel import MarginPanel
from labwatch.widgets.plot import hold_all
from labwatch.widgets.state import extra, view_state
from labwatch.widgets.throttle import Throttle, check_redraw_hz
from labwatch.widgets.visibility_panel import VisibilityPanel

__all__ = ["STOP_CONFIRM_S", "Dashboard"]

#: The stop button must be clicked twice within this many seconds.
STOP_CONFIRM_S = 5.0


class Dashboard(FeedView, w.VBox):
    """Live (or replayed) Bell-test dashboard.

    Parameters
    ----------
    endpoint : str, optional
        Publisher endpoint, ``tcp://HOST:PORT``.
    control_endpoint : str, optional
        The source's control socket; enables the stop-acquisition button and auto-stop.
    window_s, epoch_s : float
        Rolling window and analysis interval, seconds of source clock.
    analysis : AnalysisConfig, optional
        Initial analysis (its functional and target fill the controls).
    functionals : mapping of str to BellFunctional, optional
        Custom coefficient tensors offered in the functional menu, by label.
    redraw_hz : float
        Most redraws per second (at most 10).
    stale_after_s : float
        A live stream silent this long shows "NO DATA FOR N s".
    record_path : str, optional
        Default recording file.
    feed : MonitorFeed, optional
        Share an existing data path.

    Notes
    -----
    :meth:`start` creates an asyncio task on the running loop (the kernel's): other cells run
    while the dashboard updates.  Widgets are only updated (traits and bqplot data), never
    displayed, from that task.  See the module docstring for what a settings change does.

    Examples
    --------
    >>> dash = Dashboard("tcp://127.0.0.1:5780", control_endpoint="tcp://127.0.0.1:5781")  # doctest: +SKIP
    >>> dash            # doctest: +SKIP
    >>> dash.start()    # doctest: +SKIP
    """

    endpoint = Unicode("", help="Publisher endpoint").tag(sync=True)
    control_endpoint = Unicode("", help="Source control endpoint ('' = none)").tag(sync=True)
    connected = Bool(False, help="Receive the stream (the Connect button)").tag(sync=True)
    running = Bool(False, help="True while the live task receives").tag(sync=True)
    mode = Unicode("idle", help="idle, live or replay").tag(sync=True)
    functional_choice = Unicode("auto", help="Key of the functional in use").tag(sync=True)
    window_s = Float(30.0, help="Rolling window, seconds of source clock").tag(sync=True)
    target_text = Unicode("", help="Confidence target, e.g. 'p<=1e-6' ('' = none)").tag(sync=True)
    auto_stop = Bool(False, help="Send 'stop' to the source when the target is met").tag(sync=True)
    recording = Bool(False, help="Tee every received message to record_path").tag(sync=True)
    record_path = Unicode("", help="Recording file ('' = a timestamped name)").tag(sync=True)
    target_met = Bool(False, help="The shown run has met its target").tag(sync=True)
    last_stop_reply = Dict(help="The source's reply to the last stop command").tag(sync=True)
    redraw_hz = Float(4.0, help="Most redraws per second (<= 10)").tag(sync=True)
    stale_after_s = Float(3.0, help="Silence (s) before 'no data' is shown").tag(sync=True)

    def __init__(
        self,
        endpoint: str | None = None,
        control_endpoint: str | None = None,
        *,
        window_s: float = 30.0,
        epoch_s: float = 1.0,
        analysis: AnalysisConfig | None = None,
        functionals: Mapping[str, BellFunctional] | None = None,
        redraw_hz: float = 4.0,
        stale_after_s: float = 3.0,
        record_path: str | None = None,
        history_capacity: int = 1000,
        feed: MonitorFeed | None = None,
        **kwargs: Any,
    ) -> None:
        analysis = analysis or AnalysisConfig()
        if control_endpoint:
            check_endpoint(control_endpoint)
        self.feed = feed or MonitorFeed(
            endpoint,
            EngineConfig(window_s=window_s, epoch_s=epoch_s, analysis=analysis),
            history_capacity=history_capacity,
        )
        self._throttle = Throttle(check_redraw_hz(redraw_hz))
        self._busy = False  # True while a trait is set back after a refused change
        self._writer: Any | None = None
        self._stop_armed_at = -math.inf
        self._auto_stopped: set[tuple] = set()
        self._stop_future: Any | None = None
        self._functionals: dict[str, str | BellFunctional] = {k: k for k in FUNCTIONAL_LABELS}

        self.controls = ControlBar()
        self.banner = TargetBanner()
        self.header = w.HTML()
        self.bell_panel = BellPanel()
        self.margin_panel = MarginPanel()
        self.visibility_panel = VisibilityPanel()
        self.evidence_panel = EvidencePanel()
        self.alignment_panel = AlignmentPanel()
        self.health_panel = HealthPanel()
        self.panels = (
            self.bell_panel,
            self.margin_panel,
            self.visibility_panel,
            self.evidence_panel,
            self.alignment_panel,
            self.health_panel,
        )
        row = {"flex_flow": "row wrap", "align_items": "stretch", "width": "100%"}
        super().__init__(
            children=[
                self.banner,
                self.header,
                self.controls,
                w.HBox([self.bell_panel, self.margin_panel], layout=row),
                w.HBox([self.visibility_panel, self.evidence_panel], layout=row),
                w.HBox([self.alignment_panel, self.health_panel], layout=row),
            ],
            **kwargs,
        )
        for label, f in (functionals or {}).items():
            self.add_functional(f, label)
        # initial values, then the links (no observer acts before the links exist)
        self._busy = True
        self.endpoint = self.feed.endpoint or ""
        self.control_endpoint = control_endpoint or ""
        self.window_s = float(self.feed.engine.config.window_s)
        self.target_text = analysis.target or ""
        if isinstance(analysis.functional, BellFunctional):
            key = self.add_functional(analysis.functional)
        else:
            key = analysis.functional
        self.functional_choice = key
        self.record_path = record_path or ""
        self.redraw_hz = redraw_hz
        self.stale_after_s = stale_after_s
        self._busy = False
        c = self.controls
        self._linked = {
            "connected": c.connect,
            "functional_choice": c.functional,
            "window_s": c.window,
            "target_text": c.target,
            "auto_stop": c.auto_stop,
            "recording": c.record,
            "record_path": c.record_path,
        }
        self._syncing = False
        for trait, widget in self._linked.items():
            self._bind(trait, widget)
            self._syncing = True
            try:
                widget.value = getattr(self, trait)
            finally:
                self._syncing = False
        c.new_run.on_click(lambda _b: self.new_run())
        c.stop_source.on_click(lambda _b: self._stop_clicked())
        c.stop_source.disabled = not self.control_endpoint
        self.feed.add_listener(self._on_feed)
        self.redraw()

    # ------------------------------------------------------------------ public actions
    @property
    def engine(self):
        """The :class:`~labwatch.engine.MonitorEngine` behind the dashboard."""
        return self.feed.engine

    def start(self) -> None:
        """Connect and receive on the running asyncio loop (same as the Connect button)."""
        if not self.connected:
            self.connected = True
        elif not self.feed.running:
            self._start_feed()

    def stop(self) -> None:
        """Disconnect (within a tenth of a second); figures stay on screen."""
        self.connected = False

    def new_run(self) -> None:
        """Start a new run segment (the New run button)."""
        self.feed.new_run()
        self.controls.say("new run segment started: cumulative figures restart")

    def add_functional(self, functional: BellFunctional, label: str | None = None) -> str:
        """Offer a custom coefficient tensor in the functional menu; returns its key."""
        if not isinstance(functional, BellFunctional):
            raise ValueError(f"expected a BellFunctional, got {type(functional).__name__}")
        label = label or functional.name
        key = f"custom:{label}"
        self._functionals[key] = functional
        opts = [o for o in self.controls.functional.options if o[1] != key]
        self.controls.functional.options = [*opts, (f"custom: {label}", key)]
        return key

    def stop_source(self):
        """Send ``stop`` to the source now (no confirmation); see the stop button.

        On a running asyncio loop the command runs in a worker thread and an awaitable
        future is returned; otherwise the reply dict is returned.
        """
        return self._send_stop("stop requested by hand")

    # ------------------------------------------------------------------ validation
    @validate("redraw_hz")
    def _validate_redraw_hz(self, proposal):
        try:
            hz = check_redraw_hz(proposal["value"])
        except ValueError as exc:
            raise TraitError(str(exc)) from None
        self._throttle.set_rate(hz)
        return hz

    @validate("functional_choice")
    def _validate_functional_choice(self, proposal):
        key = proposal["value"]
        if key not in self._functionals:
            raise TraitError(f"functional {key!r} not in {tuple(self._functionals)}")
        return key

    @validate("window_s")
    def _validate_window_s(self, proposal):
        return _positive("window_s", proposal["value"])

    @validate("stale_after_s")
    def _validate_stale_after_s(self, proposal):
        return _positive("stale_after_s", proposal["value"])

    # ------------------------------------------------------------------ observers
    def _bind(self, name: str, widget: w.Widget) -> None:
        """Two-way binding of trait ``name`` and ``widget.value`` that survives a refusal.

        (``ipywidgets.link`` raises when an observer sets the trait back during an update.)
        """

        def from_widget(change) -> None:
            if self._syncing:
                return
            self._syncing = True
            try:
                setattr(self, name, change["new"])
            except TraitError as exc:
                self.controls.say(f"not applied: {exc}", "alarm")
            finally:
                self._syncing = False
            if widget.value != getattr(self, name):
                widget.value = getattr(self, name)

        def from_trait(change) -> None:
            current = getattr(self, name)  # not change["new"]: an observer may have refused it
            if widget.value != current:
                self._syncing = True
                try:
                    widget.value = current
                finally:
                    self._syncing = False

        widget.observe(from_widget, "value")
        self.observe(from_trait, name)

    def _set_back(self, name: str, old: Any, why: str) -> None:
        self._busy = True
        try:
            setattr(self, name, old)
        finally:
            self._busy = False
        self.controls.say(why, "alarm")

    @observe("control_endpoint")
    def _control_endpoint_changed(self, change) -> None:
        if change["new"]:
            try:
                check_endpoint(change["new"])
            except ValueError as exc:
                self._set_back("control_endpoint", change["old"], str(exc))
                return
        self.controls.stop_source.disabled = not self.control_endpoint

    @observe("connected")
    def _connected_changed(self, change) -> None:
        if self._busy:
            return
        if change["new"]:
            self._start_feed()
        else:
            self.feed.stop()
            self.controls.say("disconnecting")
        self.redraw()

    def _start_feed(self) -> None:
        try:
            self.feed.start(self.endpoint or None)
        except (RuntimeError, ValueError) as exc:
            self._set_back("connected", False, f"cannot connect: {exc}")
            return
        self.controls.say(f"receiving from {self.feed.endpoint}", "ok")

    @observe("functional_choice", "window_s", "target_text")
    def _analysis_changed(self, change) -> None:
        if self._busy:
            return
        cfg = self.feed.engine.config
        try:
            if change["name"] == "window_s":
                self.feed.reconfigure(window_s=float(change["new"]))
                what = f"rolling window {change['new']:g} s"
            elif change["name"] == "target_text":
                text = change["new"].strip()
                self.feed.reconfigure(analysis=replace(cfg.analysis, target=text or None))
                what = f"target {text!r}" if text else "no target"
            else:
                f = self._functionals[change["new"]]
                self.feed.reconfigure(analysis=replace(cfg.analysis, functional=f))
                what = f"functional {FUNCTIONAL_LABELS.get(change['new'], change['new'])}"
        except ValueError as exc:
            self._set_back(change["name"], change["old"], f"not applied: {exc}")
            return
        self.controls.say(f"{what}: new run segment started", "ok")
        self.redraw()

    @observe("recording")
    def _recording_changed(self, change) -> None:
        if self._busy:
            return
        if change["new"]:
            path = self.record_path or time.strftime("labwatch-%Y%m%d-%H%M%S.lwrec")
            try:
                from labwatch.recording import RecordWriter

                writer = RecordWriter(
                    path, metadata={"endpoint": self.endpoint, "written_by": "labwatch dashboard"}
                )
            except (ImportError, OSError, ValueError) as exc:
                self._set_back("recording", False, f"cannot record: {exc}")
                return
            self._writer = writer
            self.record_path = path
            self.feed.set_recorder(writer)
            self.controls.say(f"recording to {path}", "ok")
        else:
            self._close_writer("recording closed")

    def _close_writer(self, why: str, tone: str = "plain") -> None:
        writer, self._writer = self._writer, None
        self.feed.set_recorder(None)
        if writer is not None:
            try:
                writer.close()
            except OSError as exc:
                why = f"{why}; closing failed: {exc}"
                tone = "alarm"
            self.controls.say(f"{why}: {writer.path}", tone)

    # ------------------------------------------------------------------ stop command
    def _stop_clicked(self) -> None:
        now = time.monotonic()
        b = self.controls.stop_source
        if now - self._stop_armed_at <= STOP_CONFIRM_S:
            self._stop_armed_at = -math.inf
            b.description = "Stop acquisition"
            self._send_stop("stop requested from the dashboard")
        else:
            self._stop_armed_at = now
            b.description = "Click again to stop"
            self.controls.say(
                f"click 'Stop acquisition' again within {STOP_CONFIRM_S:g} s to ask the source "
                "to stop publishing (this does not switch off lasers or detectors)",
                "warn",
            )

    def _send_stop(self, why: str):
        ep = self.control_endpoint
        if not ep:
            self.controls.say("no control endpoint given: cannot stop the source", "alarm")
            return None
        self.controls.say(f"{why}: sending 'stop' to {ep} …", "warn")
        call = functools.partial(send_command, ep, "stop", 2.0)
        try:
            loop = asyncio.get_running_loop()
        except RuntimeError:
            reply = call()
            self._stop_reply(reply)
            return reply
        fut = loop.run_in_executor(None, call)
        fut.add_done_callback(lambda f: self._stop_reply(_result(f)))
        self._stop_future = fut
        return fut

    def _stop_reply(self, reply: dict) -> None:
        self.last_stop_reply = dict(reply)
        if reply.get("ok"):
            note = f"source replied {reply.get('state', 'ok')} (last seq {reply.get('last_seq')})"
            self.controls.say(note, "ok")
            self.banner.stop_note = "source asked to stop"
        else:
            self.controls.say(f"stop failed: {reply.get('error', reply)}", "alarm")
        self.redraw()

    # ------------------------------------------------------------------ drawing
    def _on_feed(self, feed: MonitorFeed, force: bool) -> None:
        snap = feed.latest
        target = extra(snap, "target")
        if snap is not None and target.get("met") and self.auto_stop:
            key = (snap.source, snap.run, snap.run_index)
            if key not in self._auto_stopped:
                self._auto_stopped.add(key)
                self._send_stop("target met, auto-stop on")
        if feed.recording_error and self._writer is not None:
            self._busy = True
            self.recording = False
            self._busy = False
            self._close_writer(feed.recording_error, "alarm")
        if self._throttle.ready(force):
            self.redraw()

    def redraw(self) -> None:
        """Bring every panel up to date with the feed (called at most ``redraw_hz``)."""
        feed = self.feed
        state = view_state(feed, self.stale_after_s, self.target_text)
        if self.connected and not feed.running and feed.task is not None and feed.task.done():
            self._busy = True
            self.connected = False
            self._busy = False
            if feed.error:
                self.controls.say(feed.error, "alarm")
        if time.monotonic() - self._stop_armed_at > STOP_CONFIRM_S:
            self.controls.stop_source.description = "Stop acquisition"
        with self.hold_sync():
            self.running = feed.running
            self.mode = feed.mode
            self.target_met = bool(extra(state.snapshot, "target").get("met"))
        with hold_all(*self.panels):
            for p in self.panels:
                if p is self.health_panel:
                    p.show(state, recording=self._recording_text())
                else:
                    p.show(state)
        self.banner.show(state)
        self.controls.connect.description = "Disconnect" if self.connected else "Connect"
        self.header.value = _header_html(self, state)

    def _recording_text(self) -> str:
        if self._writer is None:
            return "not recording"
        stats = getattr(self._writer, "stats", None)
        n = getattr(stats, "records_written", None)
        return f"recording to {self._writer.path} · {fmt_count(n)} records written"


def _positive(name: str, v: float) -> float:
    if not (math.isfinite(v) and v > 0):
        raise TraitError(f"{name} must be a positive number of seconds, got {v!r}")
    return v


def _result(fut) -> dict:
    try:
        return fut.result()
    except Exception as exc:  # a failing worker must show up on screen
        return {"ok": False, "error": f"{type(exc).__name__}: {exc}"}


def _header_html(dash: Dashboard, state) -> str:
    snap = state.snapshot
    if snap is None:
        what = "waiting for data"
    else:
        sc = snap.scenario
        what = (
            f"run {esc(snap.run)} (#{snap.run_index}) · {sc.settings_a}×{sc.settings_b} settings, "
            f"{sc.outcomes_a}×{sc.outcomes_b} outcomes · "
            f"{'random settings' if snap.random_settings else 'settings in blocks'} · "
            f"{fmt_count(snap.trials)} coincidences in {fmt(snap.live_time_s, '.1f')} s"
        )
    ep = esc(dash.endpoint or "no endpoint")
    return (
        '<div style="font-size:24px;font-weight:800;color:#111">labwatch · Bell-test bench'
        f'</div><div style="font-size:16px;color:#444">{ep} · {esc(state.mode)} · {what}</div>'
    )
