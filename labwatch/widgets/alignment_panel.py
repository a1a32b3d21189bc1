"""Alignment aids: fringe contrast per setting pair, correlators, rates, heralding, no-signalling."""

from __future__ import annotations

import math

import bqplot as bq
import ipywidgets as w
import numpy as np
from traitlets import Float, List

from labwatch.widgets._format import (
    esc,
    fmt_assumptions,
    fmt_p,
    fmt_percent,
    fmt_pm,
    fmt_rate,
)
from labwatch.widgets.panel import Panel, note_html
from labwatch.widgets.plot import COLORS, TimePlot, hold_all
from labwatch.widgets.readout import Readout
from labwatch.widgets.state import ViewState

__all__ = ["NO_SIGNALLING_ALERT_P", "AlignmentPanel", "pair_labels"]

#: No-signalling p-values below this are flagged (common practice, no source).
NO_SIGNALLING_ALERT_P = 0.01


def pair_labels(m_a: int, m_b: int) -> list[str]:
    """Labels ``"A0·B0", "A0·B1", ...`` of the setting pairs, row-major over ``(x, y)``."""
    return [f"A{x}·B{y}" for x in range(m_a) for y in range(m_b)]


class AlignmentPanel(Panel):
    """What an operator watches while turning waveplates and moving fibres."""

    title = "Alignment"

    contrast = List(
        Float(allow_none=True), help="Fringe contrast per setting pair (row-major)"
    ).tag(sync=True)
    coincidence_hz = Float(None, allow_none=True, help="Coincidence rate, rolling window").tag(
        sync=True
    )

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self.x_scale = bq.OrdinalScale()
        self.y_scale = bq.LinearScale(min=0.0, max=1.05)
        self.bars = bq.Bars(
            x=[],
            y=np.zeros(0),
            scales={"x": self.x_scale, "y": self.y_scale},
            colors=[COLORS["blue"]],
            padding=0.2,
        )
        self.bars_figure = bq.Figure(
            title="fringe contrast per setting pair",
            marks=[self.bars],
            axes=[
                bq.Axis(scale=self.x_scale, label="setting pair"),
                bq.Axis(scale=self.y_scale, side="left", label="contrast"),
            ],
            animation_duration=0,
            fig_margin={"top": 40, "bottom": 45, "left": 55, "right": 10},
            layout={"height": "240px", "width": "100%"},
            title_style={"font-size": "16px"},
        )
        self.rates_plot = TimePlot("rates over time", "counts per second", height="220px")
        self.rates_plot.add_line("coincidence", COLORS["blue"], "coincidences")
        self.rates_plot.add_line("accidentals", COLORS["grey"], "accidentals", style="dashed")
        self.coinc = Readout(caption="coincidences", size="large")
        self.singles = Readout(caption="singles A / B", size="medium")
        self.accidentals = Readout(caption="accidentals (R_A R_B τ)", size="medium")
        self.heralding = Readout(caption="heralding A / B", size="medium")
        self.no_signalling = Readout(caption="no-signalling test", size="medium")
        self.correlator_table = w.HTML()
        self.note = w.HTML()
        self.set_body(
            w.HBox([self.coinc, self.singles, self.accidentals]),
            w.HBox([self.heralding, self.no_signalling]),
            w.HBox(
                [self.bars_figure, self.correlator_table],
                layout={"align_items": "center"},
            ),
            self.rates_plot.figure,
            self.note,
        )

    def show(self, state: ViewState) -> None:
        snap = state.snapshot
        r = None if snap is None else snap.rates
        with self.coinc.hold_sync():
            self.coinc.text = fmt_rate(None if r is None else r.coincidence_hz)
            self.coinc.detail = (
                "" if r is None else f"± {fmt_rate(r.coincidence_hz_stderr)} (Poisson, window)"
            )
            self.coinc.tone = "info" if r is not None else "idle"
        self.singles.text = (
            "—" if r is None else f"{fmt_rate(r.singles_a_hz)} / {fmt_rate(r.singles_b_hz)}"
        )
        self.accidentals.text = fmt_rate(None if r is None else r.accidentals_hz)
        if r is not None and r.accidentals_hz is not None and r.coincidence_hz > 0:
            self.accidentals.detail = (
                f"{fmt_percent(r.accidentals_hz / r.coincidence_hz, 2)} of coincidences"
            )
        else:
            self.accidentals.detail = ""
        self.heralding.text = (
            "—" if r is None else f"{fmt_percent(r.heralding_a)} / {fmt_percent(r.heralding_b)}"
        )
        self.heralding.detail = "coincidences ÷ other party's singles"
        self._show_no_signalling(snap)
        self._show_contrast(snap)
        self.coincidence_hz = (
            None if r is None or not math.isfinite(r.coincidence_hz) else float(r.coincidence_hz)
        )
        if self.history_changed(state):
            h = state.history
            t = h.time()
            with self.rates_plot.hold():
                self.rates_plot.set_line("coincidence", t, h.series("coincidence_hz"))
                self.rates_plot.set_line("accidentals", t, h.series("accidentals_hz"))
        self.note.value = note_html(
            "Contrast (P_k − 1/d)/(1 − 1/d) of the best outcome shift k; for qubits the "
            "fringe visibility |E|. Whole run, cumulative."
        )

    def _show_no_signalling(self, snap) -> None:
        ns = None if snap is None else snap.figure("no_signalling_p")
        ro = self.no_signalling
        with ro.hold_sync():
            if ns is None:
                ro.text, ro.detail, ro.assumptions, ro.tone = (
                    "—",
                    "not in this snapshot",
                    "",
                    "idle",
                )
                return
            ro.text = f"p = {fmt_p(ns.value)}"
            ro.assumptions = fmt_assumptions(ns.assumptions)
            if math.isfinite(ns.value) and ns.value < NO_SIGNALLING_ALERT_P:
                ro.detail = (
                    "marginals depend on the distant setting: check cross-talk, "
                    "setting-dependent losses or timing"
                )
                ro.tone = "alarm"
            else:
                ro.detail = "marginals consistent with no-signalling"
                ro.tone = "ok"

    def _show_contrast(self, snap) -> None:
        if snap is None:
            labels, values = [], np.zeros(0)
        else:
            m_a, m_b = snap.contrast.shape
            labels = pair_labels(m_a, m_b)
            values = np.asarray(snap.contrast, dtype=float).ravel()
        shown = np.where(np.isfinite(values), values, 0.0)
        with hold_all(self.bars):
            self.bars.x = labels
            self.bars.y = shown
        self.contrast = [float(v) if math.isfinite(v) else None for v in values]
        self.correlator_table.value = _correlator_html(snap)


def _correlator_html(snap) -> str:
    if snap is None or snap.correlators is None:
        return ""
    e, err = snap.correlators, snap.correlator_errors
    m_a, m_b = e.shape
    head = "".join(f'<th style="padding:2px 10px">B{y}</th>' for y in range(m_b))
    rows = []
    for x in range(m_a):
        cells = "".join(
            f'<td style="padding:2px 10px;font-family:monospace">'
            f"{esc(fmt_pm(e[x, y], None if err is None else err[x, y], 3))}</td>"
            for y in range(m_b)
        )
        rows.append(f'<tr><th style="padding:2px 10px">A{x}</th>{cells}</tr>')
    return (
        '<div style="font-size:16px"><b>correlators E<sub>xy</sub></b> (whole run, ±1σ)'
        f'<table style="font-size:18px;border-collapse:collapse"><tr><th></th>{head}</tr>'
        f"{''.join(rows)}</table></div>"
    )
