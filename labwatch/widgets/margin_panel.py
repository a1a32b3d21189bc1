"""Margin over the local bound: the common-practice σ next to the stopping-safe figures."""

from __future__ import annotations

import math

import ipywidgets as w
from traitlets import Bool, Float

from labwatch.widgets._format import fmt, fmt_assumptions, fmt_p
from labwatch.widgets.panel import Panel, note_html
from labwatch.widgets.readout import Readout
from labwatch.widgets.state import ViewState, functional_info

__all__ = ["BLOCK_SETTINGS_WARNING", "MarginPanel"]

#: Shown whenever settings are held in blocks instead of drawn at random per trial.
BLOCK_SETTINGS_WARNING = (
    "Settings are held in blocks, not chosen at random per trial: this data cannot test local "
    "realism. The numbers describe the correlations only."
)


class MarginPanel(Panel):
    """Two readouts side by side, each with its assumption labels.

    Left: ``(S - L) / σ`` of the whole run (common practice, fixed n).  Right: the
    stopping-safe lower confidence bound of the Bell value compared with the local bound,
    and the stopping-safe p-value against local realism (valid however often one looks).
    """

    title = "Margin over the local bound"

    sigma = Float(None, allow_none=True, help="(S - L)/σ of the whole run").tag(sync=True)
    lcb_margin = Float(None, allow_none=True, help="Stopping-safe LCB minus the local bound").tag(
        sync=True
    )
    random_settings = Bool(True, help="False: block settings, no test of local realism").tag(
        sync=True
    )

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self.common = Readout(caption="common practice: (S − L)/σ", size="large")
        self.safe = Readout(caption="stopping-safe: lower bound − L", size="large")
        self.p_readout = Readout(caption="stopping-safe p against local realism", size="medium")
        self.warning = w.HTML()
        self.set_body(self.warning, w.HBox([self.common, self.safe]), self.p_readout)

    def show(self, state: ViewState) -> None:
        snap = state.snapshot
        _, local, _ = functional_info(snap)
        bell = None if snap is None else snap.bell
        sigma = None if bell is None else bell.margin_sigma
        sigma = sigma if sigma is not None and math.isfinite(sigma) else None
        lcb = None if snap is None else snap.figure("bell_lcb")
        pv = None if snap is None else snap.figure("p_value")
        lcb_margin = None
        if lcb is not None and local is not None and math.isfinite(lcb.value):
            lcb_margin = lcb.value - local
        random = True if snap is None else bool(snap.random_settings)
        with self.hold_sync():
            self.sigma, self.lcb_margin, self.random_settings = sigma, lcb_margin, random
        with self.common.hold_sync():
            self.common.text = fmt(sigma, ".1f") + (" σ" if sigma is not None else "")
            self.common.detail = (
                f"S = {fmt(None if bell is None else bell.value, '.4f')}, "
                f"σ = {fmt(None if bell is None else bell.stderr, '.4f')}, L = {fmt(local, 'g')}"
            )
            self.common.assumptions = "" if bell is None else fmt_assumptions(bell.assumptions)
            self.common.tone = "idle" if sigma is None else ("ok" if sigma >= 3 else "warn")
        with self.safe.hold_sync():
            self.safe.text = fmt(lcb_margin, "+.3f")
            if lcb is None:
                self.safe.detail = "no stopping-safe bound in this snapshot"
                self.safe.assumptions = ""
                self.safe.tone = "idle"
            else:
                level = lcb.confidence_level
                lvl = f" at {100 * level:g} %" if math.isfinite(level) else ""
                self.safe.detail = (
                    f"lower bound {fmt(lcb.value, '.4f')}{lvl} vs L = {fmt(local, 'g')}"
                )
                self.safe.assumptions = fmt_assumptions(lcb.assumptions)
                self.safe.tone = (
                    "idle" if lcb_margin is None else ("ok" if lcb_margin > 0 else "warn")
                )
        with self.p_readout.hold_sync():
            if pv is None:
                self.p_readout.text = "—"
                self.p_readout.detail = (
                    "needs random per-trial settings" if not random else "not in this snapshot"
                )
                self.p_readout.assumptions = ""
            else:
                self.p_readout.text = f"p ≤ {fmt_p(pv.value)}"
                self.p_readout.detail = "valid at any stopping time (look as often as you like)"
                self.p_readout.assumptions = fmt_assumptions(pv.assumptions)
            self.p_readout.tone = "info" if pv is not None else "idle"
        self.warning.value = "" if random else note_html(BLOCK_SETTINGS_WARNING, "alarm")
