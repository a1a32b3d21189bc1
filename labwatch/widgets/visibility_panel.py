"""White-noise visibility v* from the local-polytope LP over time (v* < 1: nonlocal)."""

from __future__ import annotations

import math

import ipywidgets as w
from traitlets import Float

from labwatch.widgets._format import esc, fmt, fmt_assumptions, fmt_pm
from labwatch.widgets.panel import Panel, note_html
from labwatch.widgets.plot import COLORS, TimePlot
from labwatch.widgets.readout import Readout
from labwatch.widgets.state import ViewState, extra

__all__ = ["VisibilityPanel"]


class VisibilityPanel(Panel):
    """v* with its uncertainty band, the threshold 1 and the best 2×2 sub-scenario.

    v* is the largest weight of the observed correlations that, mixed with white noise, still
    stays in the local polytope; v* < 1 means the data lie outside it (nonlocal).
    """

    title = "White-noise visibility v*"

    visibility = Float(None, allow_none=True, help="Latest v* (None: not computed)").tag(sync=True)
    visibility_high = Float(None, allow_none=True, help="Upper end of its interval").tag(sync=True)

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self.readout = Readout(caption="v* (run, LP over the local polytope)", size="huge")
        self.best = Readout(caption="best 2×2 pair", size="medium")
        self.plot = TimePlot("v* over time", "white-noise visibility v*", height="280px")
        self.plot.add_band("band", COLORS["purple"], 0.25)
        self.plot.add_line("visibility", COLORS["purple"], "v* (full LP)")
        self.plot.add_line("best_pair", COLORS["sky"], "best 2×2 pair", style="dashed", width=2)
        self.plot.add_hline("threshold", COLORS["vermillion"], "v* = 1 (local boundary)")
        self.note = w.HTML()
        self.set_body(w.HBox([self.readout, self.best]), self.plot.figure, self.note)

    def show(self, state: ViewState) -> None:
        snap = state.snapshot
        fig = None if snap is None else snap.figure("visibility")
        high = None
        if fig is not None:
            high = fig.high if math.isfinite(fig.high) else fig.value + fig.stderr
            high = high if math.isfinite(high) else None
        with self.hold_sync():
            self.visibility = None if fig is None or not math.isfinite(fig.value) else fig.value
            self.visibility_high = high
        with self.readout.hold_sync():
            if fig is None:
                self.readout.text = "—"
                self.readout.detail = "LP visibility not in this snapshot"
                self.readout.assumptions = ""
                self.readout.tone = "idle"
            else:
                self.readout.text = fmt(fig.value, ".4f")
                interval = ""
                if math.isfinite(fig.low) and math.isfinite(fig.high):
                    lvl = fig.confidence_level
                    lvl_txt = f" ({100 * lvl:g} %)" if math.isfinite(lvl) else ""
                    interval = f" · [{fig.low:.4f}, {fig.high:.4f}]{lvl_txt}"
                verdict = (
                    "below 1: outside the local polytope"
                    if high is not None and high < 1
                    else "not clearly below 1"
                )
                self.readout.detail = f"{fmt_pm(fig.value, fig.stderr, 4)}{interval} · {verdict}"
                self.readout.assumptions = fmt_assumptions(fig.assumptions)
                self.readout.tone = "ok" if high is not None and high < 1 else "warn"
        best = extra(snap, "best_pair")
        with self.best.hold_sync():
            if best:
                self.best.text = fmt(best.get("visibility"), ".4f")
                self.best.detail = (
                    f"A settings {_settings(best.get('settings_a'))} × "
                    f"B settings {_settings(best.get('settings_b'))}"
                )
            else:
                self.best.text, self.best.detail = "—", "no 2×2 sub-scenario search"
        if self.history_changed(state):
            h = state.history
            t = h.time()
            span = (float(t[0]), float(t[-1])) if t.size else (0.0, 1.0)
            with self.plot.hold():
                self.plot.set_band(
                    "band", t, h.series("visibility_low"), h.series("visibility_high")
                )
                self.plot.set_line("visibility", t, h.series("visibility"))
                self.plot.set_line("best_pair", t, h.series("best_pair_visibility"))
                self.plot.set_hline("threshold", 1.0, span)
        self.note.value = note_html(
            "Band: reported interval, else ±1σ. The fringe contrast per setting pair is in the "
            "alignment panel."
        )


def _settings(v: object) -> str:
    if isinstance(v, (list, tuple)):
        return esc(", ".join(str(i) for i in v))
    return esc(v) if v is not None else "—"
