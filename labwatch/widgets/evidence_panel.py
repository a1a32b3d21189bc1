"""Evidence against local realism: −log10 p over time, the target line and the forecast."""

from __future__ import annotations

import math
import re

import ipywidgets as w
from traitlets import Bool, Float

from labwatch.history import neg_log10_p
from labwatch.widgets._format import fmt, fmt_age, fmt_assumptions, fmt_count, fmt_p
from labwatch.widgets.margin_panel import BLOCK_SETTINGS_WARNING
from labwatch.widgets.panel import Panel, note_html
from labwatch.widgets.plot import COLORS, TimePlot
from labwatch.widgets.readout import Readout
from labwatch.widgets.state import ViewState, extra

__all__ = ["EvidencePanel", "target_p_threshold"]

_P_TARGET = re.compile(r"^\s*p\s*(?:<=|<|≤)\s*([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*$")


def target_p_threshold(text: str) -> float | None:
    """The ``X`` of a target typed as ``"p<=X"`` (for drawing its line), else None.

    Only a drawing aid: whether the target is met is read from the snapshot.
    """
    m = _P_TARGET.match(text or "")
    if not m:
        return None
    x = float(m.group(1))
    return x if 0 < x < 1 else None


class EvidencePanel(Panel):
    """−log10 of the stopping-safe p-value, the target line and the time-to-target forecast."""

    title = "Evidence against local realism"

    neg_log10_p = Float(None, allow_none=True, help="Latest −log10 p (None: not computed)").tag(
        sync=True
    )
    target_level = Float(None, allow_none=True, help="−log10 of the p target, when one").tag(
        sync=True
    )
    target_met = Bool(False, help="The snapshot reports the target met").tag(sync=True)

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self.readout = Readout(caption="−log10 p (stopping-safe)", size="huge")
        self.forecast = Readout(caption="time to target (forecast)", size="large")
        self.plot = TimePlot("−log10 p over time", "−log10 p", height="260px")
        self.plot.add_line("evidence", COLORS["blue"], "−log10 p")
        self.plot.add_hline("target", COLORS["green"], "target")
        self.warning = w.HTML()
        self.note = w.HTML()
        self.set_body(
            self.warning, w.HBox([self.readout, self.forecast]), self.plot.figure, self.note
        )

    def show(self, state: ViewState) -> None:
        snap = state.snapshot
        pv = None if snap is None else snap.figure("p_value")
        level = neg_log10_p(pv.value) if pv is not None else math.nan
        thr = target_p_threshold(state.target_text)
        target = extra(snap, "target")
        with self.hold_sync():
            self.neg_log10_p = level if math.isfinite(level) else None
            self.target_level = None if thr is None else -math.log10(thr)
            self.target_met = bool(target.get("met"))
        with self.readout.hold_sync():
            self.readout.text = fmt(level, ".2f")
            self.readout.detail = "" if pv is None else f"p ≤ {fmt_p(pv.value)}"
            self.readout.assumptions = "" if pv is None else fmt_assumptions(pv.assumptions)
            self.readout.tone = "ok" if self.target_met else ("info" if pv is not None else "idle")
        fc = extra(snap, "forecast")
        with self.forecast.hold_sync():
            if self.target_met:
                met_at = target.get("met_at_source_time")
                self.forecast.text = "met"
                self.forecast.detail = (
                    f"at source time {fmt(met_at, '.1f')} s after "
                    f"{fmt_count(target.get('trials'))} coincidences"
                )
                self.forecast.tone = "ok"
            elif fc:
                secs, err = fc.get("seconds"), fc.get("seconds_stderr")
                self.forecast.text = "≈ " + fmt_age(secs) if fmt_age(secs) != "—" else "—"
                self.forecast.detail = (
                    f"± {fmt_age(err)} · at about {fmt_count(_int(fc.get('trials')))} trials"
                )
                self.forecast.tone = "info"
            else:
                self.forecast.text, self.forecast.detail, self.forecast.tone = "—", "", "idle"
        h = state.history
        t = h.time()
        span = (float(t[0]), float(t[-1])) if t.size else (0.0, 1.0)
        with self.plot.hold():
            if self.history_changed(state):
                self.plot.set_line("evidence", t, h.series("neg_log10_p"))
            self.plot.set_hline("target", self.target_level, span)
        random = True if snap is None else snap.random_settings
        self.warning.value = "" if random else note_html(BLOCK_SETTINGS_WARNING, "alarm")
        notes = []
        desc = target.get("description") or state.target_text
        notes.append(f"Target: {desc}." if desc else "No confidence target set.")
        strength = extra(snap, "strength")
        if strength:
            notes.append(
                f"Evidence rate {fmt(strength.get('kl_nats_per_trial'), '.3g')} nats per trial; "
                f"at least {fmt_count(_int(strength.get('min_trials')))} trials for the target."
            )
        self.note.value = note_html(" ".join(notes)) if notes else ""


def _int(v: object) -> int | None:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        return None
    return int(round(v))
