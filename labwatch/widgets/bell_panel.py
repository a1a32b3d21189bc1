"""Bell value over time: rolling window and whole run, ±1σ bands, local and quantum bounds."""

from __future__ import annotations

import ipywidgets as w
from traitlets import Float, Unicode

from labwatch.widgets._format import fmt, fmt_assumptions, fmt_pm
from labwatch.widgets.panel import Panel, note_html
from labwatch.widgets.plot import COLORS, TimePlot
from labwatch.widgets.readout import Readout
from labwatch.widgets.state import ViewState, extra, functional_info

__all__ = ["BellPanel"]


class BellPanel(Panel):
    """Large readouts of the run and window values and their trace over source time."""

    title = "Bell value"

    functional = Unicode("", help="Name of the functional shown ('' when none)").tag(sync=True)
    local_bound = Float(None, allow_none=True, help="Its local bound").tag(sync=True)
    quantum_bound = Float(None, allow_none=True, help="Its quantum maximum when known").tag(
        sync=True
    )

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self.run_readout = Readout(caption="whole run", size="huge")
        self.window_readout = Readout(caption="rolling window", size="large")
        self.plot = TimePlot("Bell value over time", "Bell value", height="300px")
        p = self.plot
        p.add_band("run_band", COLORS["blue"], 0.22)
        p.add_band("window_band", COLORS["orange"], 0.22)
        p.add_line("run", COLORS["blue"], "whole run")
        p.add_line("window", COLORS["orange"], "rolling window", width=2.0)
        p.add_hline("local", COLORS["vermillion"], "local bound")
        p.add_hline("quantum", COLORS["green"], "quantum max", style="dotted")
        self.note = w.HTML()
        self.set_body(w.HBox([self.run_readout, self.window_readout]), self.plot.figure, self.note)

    def show(self, state: ViewState) -> None:
        snap = state.snapshot
        name, local, quantum = functional_info(snap)
        with self.hold_sync():
            self.functional, self.local_bound, self.quantum_bound = name, local, quantum
        run = None if snap is None else snap.bell
        win = None if snap is None else snap.bell_window
        for readout, b, cap in (
            (self.run_readout, run, "whole run"),
            (self.window_readout, win, "rolling window"),
        ):
            with readout.hold_sync():
                if cap == "rolling window" and snap is not None:
                    cap = f"rolling window ({snap.window_s:g} s)"
                readout.caption = f"{name or 'Bell value'} · {cap}"
                readout.text = fmt(None if b is None else b.value, ".3f")
                readout.detail = (
                    f"{fmt_pm(None if b is None else b.value, None if b is None else b.stderr)}"
                    f" · local {fmt(local, 'g')} · quantum max {fmt(quantum, '.3f')}"
                )
                readout.assumptions = "" if b is None else fmt_assumptions(b.assumptions)
                margin = None if b is None else b.margin_sigma
                readout.tone = (
                    "idle"
                    if not (margin is not None and margin == margin)
                    else ("ok" if margin >= 3 else "warn")
                )
        if self.history_changed(state):
            h = state.history
            t = h.time()
            span = (float(t[0]), float(t[-1])) if t.size else (0.0, 1.0)
            r, re = h.series("bell"), h.series("bell_err")
            wv, we = h.series("bell_window"), h.series("bell_window_err")
            with self.plot.hold():
                self.plot.set_band("run_band", t, r - re, r + re)
                self.plot.set_band("window_band", t, wv - we, wv + we)
                self.plot.set_line("run", t, r)
                self.plot.set_line("window", t, wv)
                self.plot.set_hline("local", local, span)
                self.plot.set_hline("quantum", quantum, span)
        notes = []
        if snap is not None and not name:
            notes.append(
                note_html(
                    f"No Bell functional fits this scenario ({snap.scenario}) with the chosen "
                    "option; pick another functional or the LP certificate.",
                    "warn",
                )
            )
        cert = extra(snap, "certificate")
        if cert:
            notes.append(
                note_html(
                    f"LP certificate {cert.get('name', '')}: value {fmt(cert.get('value'), '.4f')}"
                    f" vs local bound {fmt(cert.get('local_bound'), '.4f')}"
                )
            )
        notes.append(note_html("Bands: ±1σ (delta method; fixed n · Gaussian · i.i.d.)."))
        self.note.value = "".join(notes)
