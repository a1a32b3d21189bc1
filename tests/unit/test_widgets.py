"""Widgets without a browser: feed known frames, check traits, readouts and bqplot mark data."""

from __future__ import annotations

import asyncio
import math
from dataclasses import replace

import numpy as np
import pytest
from traitlets import TraitError

from labwatch.analysis import AnalysisConfig
from labwatch.bell import ch_eberhard
from labwatch.history import History, neg_log10_p
from labwatch.protocol import encode_events, encode_histogram, encode_status
from labwatch.scenario import Scenario
from labwatch.snapshot import Figure
from labwatch.widgets import Dashboard, LiveMonitor, MonitorFeed
from labwatch.widgets._format import DASH, fmt, fmt_age, fmt_assumptions, fmt_p, fmt_pm, fmt_rate
from labwatch.widgets.evidence_panel import target_p_threshold
from labwatch.widgets.health_panel import stream_verdict
from labwatch.widgets.readout import Readout
from labwatch.widgets.state import ViewState, functional_info
from labwatch.widgets.throttle import Throttle

SC = Scenario(2, 2, 2, 2)
NO_LP = AnalysisConfig(visibility=False)


def block_frames(n: int, same: int = 85, diff: int = 15, run: str = "bench-1") -> list:
    """Histogram messages cycling the four CHSH pairs; E = ±(same-diff)/(same+diff) exactly."""
    out = []
    for seq in range(n):
        pair = divmod(seq % 4, 2)
        c = [[same, diff], [diff, same]] if pair != (1, 1) else [[diff, same], [same, diff]]
        out.append(
            encode_histogram(
                source="bench",
                run=run,
                seq=seq,
                t_start=seq * 0.1,
                t_stop=(seq + 1) * 0.1,
                scenario=SC,
                pair=pair,
                counts=np.array(c),
            )
        )
    return out


def event_frames(n: int, seed: int = 5, flip_equal: float = 0.15) -> list:
    """Random-setting event messages: b = a except with probability flip (0.85 on pair (1,1))."""
    rng = np.random.default_rng(seed)
    out = []
    for seq in range(n):
        k = 400
        x, y, a = rng.integers(0, 2, k), rng.integers(0, 2, k), rng.integers(0, 2, k)
        flip = rng.random(k) < np.where((x == 1) & (y == 1), 1 - flip_equal, flip_equal)
        ev = np.stack([x, y, a, a ^ flip], axis=1)
        out.append(
            encode_events(
                source="bench",
                run="ev-1",
                seq=seq,
                t_start=seq * 0.1,
                t_stop=(seq + 1) * 0.1,
                scenario=SC,
                events=ev,
                setting_probabilities=np.full((2, 2), 0.25),
            )
        )
    return out


# --------------------------------------------------------------------------- formatting


def test_formatting_shows_dash_when_absent_and_two_significant_error_digits():
    assert fmt(None) == fmt(math.nan) == fmt(math.inf) == DASH
    assert fmt_pm(2.71428, 0.01234) == "2.714 ± 0.012"
    assert fmt_pm(2.71428, 0.34) == "2.71 ± 0.34"
    assert fmt_pm(2.71428, math.nan) == "2.714"
    assert fmt_rate(3120.0) == "3.12 k/s" and fmt_rate(None) == DASH
    assert fmt_age(3725) == "62 min 05 s" and fmt_p(3.1e-9) == "3.1e-09"
    assert target_p_threshold("p<=1e-6") == 1e-6 and target_p_threshold("p ≤ 0.001") == 0.001
    assert target_p_threshold("lcb>local@0.01") is None and target_p_threshold("p<=2") is None


def test_readout_renders_its_traits():
    r = Readout(caption="CHSH", size="huge")
    r.text, r.detail, r.assumptions, r.tone = "2.714", "± 0.012", "fixed n · i.i.d.", "ok"
    for part in ("CHSH", "2.714", "± 0.012", "fixed n · i.i.d.", "60px", "#00704a"):
        assert part in r.value
    with pytest.raises(TraitError):
        r.tone = "purple"


def test_throttle_limits_rate():
    now = [0.0]
    th = Throttle(10.0, clock=lambda: now[0])
    fired = 0
    for _ in range(1000):  # 1 s of calls every millisecond
        fired += th.ready()
        now[0] += 0.001
    assert fired == 10
    assert th.ready(force=True)
    with pytest.raises(ValueError, match="25"):
        Throttle(25)


# --------------------------------------------------------------------------- LiveMonitor


def test_live_monitor_trace_follows_engine_snapshots():
    mon = LiveMonitor(window_s=2.0, analysis=NO_LP, trace="run")
    for frames in block_frames(60):
        mon.ingest(frames, received_wall=1000.0)
    mon.flush()
    snaps_t = mon.feed.history.time()
    # E = ±0.7 on every pair, S = 4 * 0.7 = 2.8 (hand computation)
    assert mon.value == pytest.approx(2.8, abs=1e-12)
    assert mon.stderr == pytest.approx(mon.feed.latest.bell.stderr)
    assert mon.local_bound == 2.0 and mon.functional == "CHSH"
    assert mon.points == 6 and mon.trials == 60 * 200
    line, band = mon.plot.marks["value"], mon.plot.marks["band"]
    np.testing.assert_allclose(line.x, snaps_t)
    np.testing.assert_allclose(line.y, mon.feed.history.series("bell"))
    assert np.asarray(band.y).shape == (2, 6)
    lo, hi = np.asarray(band.y)
    err = mon.feed.history.series("bell_err")
    np.testing.assert_allclose(lo, line.y - err)
    np.testing.assert_allclose(hi, line.y + err)
    local = mon.plot.marks["local"]
    assert local.visible and list(local.y) == [2.0, 2.0]
    assert list(local.x) == [snaps_t[0], snaps_t[-1]]
    # the quantum line is drawn exactly when the snapshot reports a quantum bound
    quantum = functional_info(mon.feed.latest)[2]
    assert mon.quantum_bound == quantum
    assert mon.plot.marks["quantum"].visible is (quantum is not None)
    assert "2.800" in mon.readout.value and "fixed n" in mon.readout.value
    assert "Settings held in blocks" in mon.footer.value  # histogram stream = block settings
    assert "interlock" in mon.footer.value


def test_live_monitor_window_trace_and_quantum_line_from_extras():
    mon = LiveMonitor(window_s=1.0, analysis=NO_LP)  # trace="window" by default
    for frames in block_frames(40):
        mon.ingest(frames, received_wall=1000.0)
    mon.flush()
    snap = mon.feed.latest
    q = 2 * math.sqrt(2)
    info = {"name": "CHSH", "local_bound": 2.0, "quantum_bound": q, "no_signalling_bound": 4.0}
    mon.feed.add_snapshot(replace(snap, extras={"functional": info}))
    mon.redraw()
    assert mon.value == pytest.approx(snap.bell_window.value)
    assert mon.quantum_bound == pytest.approx(q)
    quantum = mon.plot.marks["quantum"]
    assert quantum.visible and np.allclose(quantum.y, [q, q])
    assert "2.828" in mon.readout.value
    with pytest.raises(ValueError, match="'sideways'"):
        LiveMonitor(trace="sideways")
    with pytest.raises(TraitError):
        mon.redraw_hz = 50


def test_replay_of_a_frame_list_equals_the_live_ingest_path():
    frames = event_frames(50)
    live = LiveMonitor(window_s=2.0, analysis=NO_LP)
    for f in frames:
        live.ingest(f, received_wall=5.0)
    live.flush()
    again = LiveMonitor(window_s=2.0, analysis=NO_LP)
    final = again.replay(frames)
    assert final is again.feed.latest and again.feed.replayed == 50
    assert again.value == live.value and again.stderr == live.stderr
    np.testing.assert_array_equal(again.plot.marks["value"].y, live.plot.marks["value"].y)
    assert "blocks" not in again.footer.value  # random settings: no block warning


def test_start_needs_a_running_loop_and_an_endpoint():
    mon = LiveMonitor("tcp://127.0.0.1:5999", analysis=NO_LP)
    with pytest.raises(RuntimeError, match="running asyncio loop"):
        mon.start()
    with pytest.raises(ValueError, match="no endpoint"):
        asyncio.run(_start(LiveMonitor(analysis=NO_LP)))


async def _start(mon):
    mon.start()


def test_history_stays_bounded_in_a_long_stream():
    feed = MonitorFeed(history_capacity=8)
    mon = LiveMonitor(feed=feed, trace="run")
    for frames in block_frames(400):  # 40 epochs
        mon.ingest(frames, received_wall=0.0)
    mon.flush()
    assert len(feed.history) <= 8 and feed.history.stride >= 4
    assert mon.points == feed.history.points <= 9
    assert mon.plot.marks["value"].x[-1] == pytest.approx(feed.latest.t_stop - feed.latest.t_start)


# --------------------------------------------------------------------------- Dashboard


def _dash(**kw) -> Dashboard:
    kw.setdefault("analysis", NO_LP)
    kw.setdefault("window_s", 2.0)
    return Dashboard(**kw)


def test_dashboard_panels_from_a_random_setting_stream():
    d = _dash()
    for f in event_frames(50):
        d.ingest(f, received_wall=100.0)
    d.flush()
    snap = d.feed.latest
    assert snap.random_settings
    b = d.bell_panel
    assert b.functional == "CHSH" and b.local_bound == 2.0
    assert f"{snap.bell.value:.3f}" in b.run_readout.value
    assert f"{snap.bell_window.value:.3f}" in b.window_readout.value
    np.testing.assert_allclose(b.plot.marks["run"].y, d.feed.history.series("bell"))
    np.testing.assert_allclose(b.plot.marks["window"].y, d.feed.history.series("bell_window"))
    assert b.plot.marks["local"].visible
    m = d.margin_panel
    assert m.sigma == pytest.approx(snap.bell.margin_sigma) and m.random_settings
    assert m.warning.value == ""
    assert "fixed n" in m.common.value
    lcb = snap.figure("bell_lcb")  # the confidence-sequence bound: shown as a margin over L
    assert m.lcb_margin == pytest.approx(lcb.value - snap.bell.local_bound)
    assert "stopping-safe" in m.safe.value
    a = d.alignment_panel
    np.testing.assert_allclose(a.contrast, snap.contrast.ravel())
    assert list(a.bars.x) == ["A0·B0", "A0·B1", "A1·B0", "A1·B1"]
    np.testing.assert_allclose(a.bars.y, snap.contrast.ravel())
    assert a.coincidence_hz == pytest.approx(snap.rates.coincidence_hz)
    assert "correlators" in a.correlator_table.value
    # the LP is off in this configuration: its figure is absent and shown as "—"
    assert snap.figure("visibility") is None
    assert d.visibility_panel.visibility is None and DASH in d.visibility_panel.readout.value
    p = snap.figure("p_value")  # random settings: the stopping-safe test runs
    assert p is not None
    assert d.evidence_panel.neg_log10_p == pytest.approx(neg_log10_p(p.value))
    assert fmt_assumptions(p.assumptions) in d.evidence_panel.readout.value
    assert not d.banner.met and d.banner.layout.display == "none"


def test_block_stream_says_it_cannot_test_local_realism():
    d = _dash()
    for f in block_frames(30):
        d.ingest(f, received_wall=1.0)
    d.flush()
    assert not d.margin_panel.random_settings
    assert "cannot test local realism" in d.margin_panel.warning.value
    assert "cannot test local realism" in d.evidence_panel.warning.value
    assert "random per-trial settings" in d.margin_panel.p_readout.value
    assert "settings in blocks" in d.header.value


def _with_figures(snap, met: bool):
    figs = (
        Figure(
            "visibility",
            0.80,
            stderr=0.01,
            low=0.78,
            high=0.82,
            confidence_level=0.95,
            assumptions=("i.i.d.", "fixed n"),
        ),
        Figure("p_value", 1e-7, assumptions=("stopping-safe", "random settings")),
        Figure("bell_lcb", 2.31, confidence_level=0.99, assumptions=("i.i.d.", "stopping-safe")),
        Figure("no_signalling_p", 0.002, assumptions=("i.i.d.",)),
    )
    extras = {
        "target": {
            "description": "p<=1e-6",
            "met": met,
            "met_at_source_time": 4.2,
            "trials": 12345,
        },
        "forecast": {"seconds": 30.0, "seconds_stderr": 5.0, "trials": 90000},
        "best_pair": {"settings_a": [0, 1], "settings_b": [0, 1], "visibility": 0.76},
        "certificate": {"name": "facet-3", "local_bound": 2.0, "value": 2.6},
        "strength": {"kl_nats_per_trial": 0.0123, "min_trials": 1500},
        "functional": {
            "name": "CHSH",
            "local_bound": 2.0,
            "quantum_bound": 2 * math.sqrt(2),
            "no_signalling_bound": 4.0,
        },
    }
    return replace(snap, figures=figs, extras=extras)


@pytest.mark.parametrize("met", [False, True])
def test_panels_show_the_analysis_figures_with_their_assumptions(met):
    d = _dash(analysis=replace(NO_LP, target="p<=1e-6"))
    assert d.target_text == "p<=1e-6"
    for f in event_frames(30):
        d.ingest(f, received_wall=1.0)
    d.flush()
    for k in range(3):  # three epochs with figures, to draw lines
        snap = replace(_with_figures(d.feed.latest, met), t_stop=d.feed.latest.t_stop + k)
        d.feed.add_snapshot(snap)
    d.redraw()
    v = d.visibility_panel
    assert v.visibility == 0.80 and v.visibility_high == 0.82
    assert "0.8000" in v.readout.value and "[0.7800, 0.8200] (95 %)" in v.readout.value
    assert "i.i.d. · fixed n" in v.readout.value and "outside the local polytope" in v.readout.value
    band = np.asarray(v.plot.marks["band"].y)
    assert band.shape == (2, 3) and np.allclose(band[0], 0.78) and np.allclose(band[1], 0.82)
    assert np.allclose(v.plot.marks["threshold"].y, 1.0) and v.plot.marks["threshold"].visible
    assert np.allclose(v.plot.marks["best_pair"].y, 0.76) and "0.7600" in v.best.value
    m = d.margin_panel
    assert m.lcb_margin == pytest.approx(0.31)
    assert "+0.310" in m.safe.value and "99 %" in m.safe.value and "stopping-safe" in m.safe.value
    assert "1.0e-07" in m.p_readout.value
    e = d.evidence_panel
    assert e.neg_log10_p == pytest.approx(7.0) and e.target_level == pytest.approx(6.0)
    assert np.allclose(e.plot.marks["evidence"].y[-3:], 7.0)  # the three injected epochs
    assert np.allclose(e.plot.marks["target"].y, 6.0)
    assert "0.0123 nats per trial" in e.note.value
    ns = d.alignment_panel.no_signalling
    assert "p = 0.002" in ns.value and "cross-talk" in ns.value
    assert "facet-3" in d.bell_panel.note.value
    assert d.bell_panel.quantum_bound == pytest.approx(2 * math.sqrt(2))
    assert d.target_met is met and e.target_met is met and d.banner.met is met
    if met:
        assert d.banner.layout.display == "block" and "TARGET MET" in d.banner.value
        assert "12\u2009345" in d.banner.value and "met" in e.forecast.value
    else:
        assert d.banner.layout.display == "none"
        assert "≈ 30 s" in e.forecast.value and "± 5.0 s" in e.forecast.value


def test_settings_changes_start_a_new_run_segment():
    d = _dash()
    for f in event_frames(30):
        d.ingest(f, received_wall=1.0)
    d.flush()
    assert d.feed.latest.run_index == 0 and d.feed.history.points == 3
    d.functional_choice = "cglmp"
    assert d.engine.config.analysis.functional == "cglmp"
    assert d.engine.run.index == 1
    for f in event_frames(60)[30:]:
        d.ingest(f, received_wall=2.0)
    d.flush()
    assert d.feed.latest.run_index == 1 and d.feed.latest.functional == "CGLMP2"
    assert d.feed.history.run_key[2] == 1  # the history holds the new segment only
    assert d.bell_panel.functional == "CGLMP2"
    d.window_s = 1.5
    assert d.engine.config.window_s == 1.5 and d.engine.run.index == 2
    assert d.controls.window.value == 1.5  # the control follows the trait (linked)
    d.controls.target.value = "p<=1e-3"
    assert d.engine.config.analysis.target == "p<=1e-3" and d.engine.run.index == 3
    with pytest.raises(TraitError, match="'nope'"):
        d.functional_choice = "nope"
    with pytest.raises(TraitError):
        d.window_s = -1.0


def test_custom_functional_from_the_menu():
    d = _dash(functionals={"CH (Eberhard)": ch_eberhard()})
    keys = [k for _, k in d.controls.functional.options]
    assert "custom:CH (Eberhard)" in keys
    d.controls.functional.value = "custom:CH (Eberhard)"
    for f in event_frames(20):
        d.ingest(f, received_wall=1.0)
    d.flush()
    assert d.feed.latest.functional == "CH" and d.bell_panel.local_bound == 0.0


def test_health_panel_lists_rejections_and_flags_silence():
    d = _dash()
    frames = block_frames(10)
    d.ingest(frames[0], received_wall=10.0)
    d.ingest(frames[0], received_wall=10.1)  # duplicate
    d.ingest([b"junk"], received_wall=10.2)  # wrong frame count
    d.ingest(frames[3], received_wall=10.3)  # gap of two
    d.ingest(
        encode_status(source="bench", run="bench-1", t=0.4, state="running", last_seq=3),
        received_wall=10.4,
    )
    d.redraw()
    hp = d.health_panel
    assert hp.rejected == 2
    text = hp.rejections.value
    assert "duplicate × 1" in text and "frame_count × 1" in text and "expected 3 frames" in text
    assert ">2</div>" in hp.counters.value  # missing = 2, shown in red
    h = d.feed.health()
    live_quiet = ViewState(None, History(4), h, now_wall=25.0, mode="live", stale_after_s=3.0)
    assert stream_verdict(live_quiet) == ("NO DATA FOR 15 s", "alarm")
    live_ok = replace(live_quiet, now_wall=11.0)
    assert stream_verdict(live_ok)[1] == "ok"
    # heartbeats keep coming (last at 10.4 s) but the last data message is 8 s old
    beats_only = replace(live_quiet, now_wall=11.0, data_age_s=8.0)
    assert stream_verdict(beats_only) == ("NO DATA FOR 8.0 s (heartbeats still arriving)", "alarm")
    assert stream_verdict(replace(live_quiet, mode="idle"))[1] == "idle"


def test_stop_button_needs_two_clicks_and_a_control_endpoint():
    d = _dash()
    assert d.controls.stop_source.disabled  # no control endpoint given
    assert d.stop_source() is None and "no control endpoint" in d.controls.message.value
    d2 = _dash(control_endpoint="tcp://127.0.0.1:1")
    d2.controls.stop_source.click()
    assert d2.controls.stop_source.description == "Click again to stop"
    assert d2.last_stop_reply == {}  # nothing sent after one click


def test_connect_without_running_loop_is_refused_visibly():
    d = _dash(endpoint="tcp://127.0.0.1:5999")
    d.controls.connect.value = True
    assert d.connected is False and d.controls.connect.value is False
    assert "running asyncio loop" in d.controls.message.value


def test_controls_show_the_initial_settings():
    d = Dashboard(window_s=7.5, analysis=replace(NO_LP, functional="chsh", target="p<=1e-4"))
    c = d.controls
    assert (c.window.value, c.functional.value, c.target.value) == (7.5, "chsh", "p<=1e-4")
    assert c.connect.value is False and c.record.value is False


def test_trace_switch_redraws_the_other_series():
    mon = LiveMonitor(window_s=1.0, analysis=NO_LP, trace="run")
    for frames in block_frames(60, same=80, diff=20):
        mon.ingest(frames, received_wall=0.0)
    mon.flush()
    np.testing.assert_allclose(mon.plot.marks["value"].y, mon.feed.history.series("bell"))
    mon.trace = "window"
    np.testing.assert_allclose(mon.plot.marks["value"].y, mon.feed.history.series("bell_window"))
    assert mon.value == mon.feed.latest.bell_window.value


def test_control_endpoint_can_be_given_later_and_is_checked():
    d = _dash()
    assert d.controls.stop_source.disabled
    d.control_endpoint = "tcp://127.0.0.1:5781"
    assert not d.controls.stop_source.disabled
    d.control_endpoint = "not an endpoint"
    assert d.control_endpoint == "tcp://127.0.0.1:5781"
    assert "bad endpoint" in d.controls.message.value


class _Notes:
    """Test double of a recorder: keeps annotations."""

    def __init__(self) -> None:
        self.notes: list[str] = []

    def annotate(self, text, *, received_wall, received_mono):
        self.notes.append(text)

    def write(self, frames, *, received_wall, received_mono, rejected_reason=None):
        pass


def test_settings_change_is_noted_in_the_recording():
    d = _dash()
    notes = _Notes()
    d.feed.set_recorder(notes)
    d.window_s = 4.0
    assert notes.notes and "window_s=4" in notes.notes[-1]
    d.functional_choice = "chsh"
    assert "functional=chsh" in notes.notes[-1]
