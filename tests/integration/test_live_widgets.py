"""Widgets on a real ZeroMQ stream inside a running asyncio loop (as in a notebook kernel)."""

from __future__ import annotations

import asyncio
import math
import socket
import threading
import time
from dataclasses import replace

import pytest

from labwatch.analysis import AnalysisConfig
from labwatch.recording import read_records
from labwatch.widgets import Dashboard, LiveMonitor
from simulators.publisher import Publisher, PublisherConfig
from simulators.quantum import polarization_source

pytestmark = pytest.mark.timeout(60)


def _port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _publisher(endpoint: str, control: str | None = None, duration_s: float = 30.0, seed=3):
    # V = 0.95: S = 2 sqrt(2) 0.95 = 2.687 for the optimal CHSH analyzers (Born rule)
    src = polarization_source(visibility=0.95, pair_rate_hz=20_000.0, efficiency=0.25)
    cfg = PublisherConfig(
        endpoint=endpoint,
        settings="random",
        duration_s=duration_s,
        speed=4.0,
        seed=seed,
        startup_delay_s=0.5,
        control_endpoint=control,
    )
    pub = Publisher(src, cfg)
    th = threading.Thread(target=pub.run, daemon=True)
    th.start()
    return pub, th


async def _until(cond, timeout_s: float, step_s: float = 0.05) -> int:
    """Await ``cond()`` while counting loop wake-ups (a blocked loop would not wake)."""
    wakeups = 0
    deadline = time.monotonic() + timeout_s
    while not cond():
        if time.monotonic() > deadline:
            raise AssertionError("condition not met in time")
        await asyncio.sleep(step_s)
        wakeups += 1
    return wakeups


def test_live_monitor_fills_its_trace_while_the_loop_stays_free(endpoint):
    pub, th = _publisher(endpoint, duration_s=10.0)
    mon = LiveMonitor(endpoint, window_s=5.0, epoch_s=0.5, analysis=AnalysisConfig())

    async def main() -> tuple[int, float]:
        mon.start()
        assert mon.running and mon.feed.task is not None  # strong reference kept
        t0 = time.monotonic()
        wakeups = await _until(lambda: mon.points >= 6, timeout_s=20)
        elapsed = time.monotonic() - t0
        mon.stop()
        await mon.wait(5)
        return wakeups, elapsed

    wakeups, elapsed = asyncio.run(main())
    th.join(15)
    # another coroutine kept running: at least a quarter of the possible 20 wake-ups/s
    # (lenient: a loaded CI machine is slow, a blocked loop gives ~0)
    assert wakeups >= 0.25 * elapsed / 0.05
    assert not mon.running and mon.feed.error is None
    assert mon.points >= 6 and len(mon.plot.marks["value"].y) == mon.points
    # 5 s windows of ~6000 coincidences: σ ≈ 0.03 (see the readout); 2.687 ± 10σ
    assert mon.value is not None and abs(mon.value - 2.687) < 10 * mon.stderr
    assert mon.local_bound == 2.0 and mon.plot.marks["local"].visible


def test_dashboard_stop_button_recording_and_replay(endpoint, tmp_path):
    control = f"tcp://127.0.0.1:{_port()}"
    path = tmp_path / "bench.lwrec"
    pub, th = _publisher(endpoint, control, duration_s=60.0)
    dash = Dashboard(endpoint, control, window_s=5.0, epoch_s=0.5, record_path=str(path))

    async def main() -> None:
        dash.recording = True
        dash.start()
        await _until(lambda: dash.feed.latest is not None and dash.feed.latest.trials > 3000, 20)
        assert dash.health_panel.verdict.startswith("receiving")
        dash.controls.stop_source.click()
        await asyncio.sleep(0.2)
        assert dash.last_stop_reply == {}  # one click only arms the button
        dash.controls.stop_source.click()
        await _until(lambda: bool(dash.last_stop_reply), 10)
        await _until(lambda: dash.feed.health().source_state == "stopped", 10)
        dash.stop()
        await dash.wait(5)
        dash.recording = False

    asyncio.run(main())
    th.join(10)
    assert dash.last_stop_reply["ok"] and dash.last_stop_reply["state"] == "stopping"
    assert pub.stopped_by_command and "source asked to stop" in dash.banner.stop_note
    assert not dash.connected and not dash.controls.connect.value
    rec = read_records(path)
    assert rec.tail.status == "clean" and len(rec.records) == dash.feed.health().messages
    # replaying the recording through a fresh engine gives the live figures exactly
    again = LiveMonitor(window_s=5.0, epoch_s=0.5)
    final = again.replay(path)
    live = dash.feed.latest
    assert final.trials == live.trials and final.bell.value == live.bell.value
    assert again.feed.replay_result.verdict_changes == 0


def test_auto_stop_sends_stop_once_when_the_target_is_met(endpoint):
    control = f"tcp://127.0.0.1:{_port()}"
    pub, th = _publisher(endpoint, control, duration_s=60.0, seed=4)
    dash = Dashboard(endpoint, control, window_s=5.0, epoch_s=0.5)
    dash.auto_stop = True

    async def main() -> None:
        dash.start()
        await _until(lambda: dash.feed.latest is not None, 20)
        snap = dash.feed.latest
        met = {"description": "p<=1e-6", "met": True, "met_at_source_time": 2.0, "trials": 10}
        # what the analysis reports once its target rule fires
        dash.feed.add_snapshot(replace(snap, extras={**snap.extras, "target": met}))
        dash.feed.add_snapshot(replace(snap, extras={**snap.extras, "target": met}))
        dash.redraw()  # (later snapshots of the engine do not carry the injected target)
        assert dash.target_met and "TARGET MET" in dash.banner.value
        await _until(lambda: bool(dash.last_stop_reply), 10)
        await _until(lambda: not th.is_alive(), 10)
        dash.stop()
        await dash.wait(5)

    asyncio.run(main())
    assert pub.stopped_by_command and dash.last_stop_reply["ok"]
    assert len(dash._auto_stopped) == 1  # sent once per run, not once per snapshot
    assert "source asked to stop" in dash.banner.stop_note
    assert math.isfinite(dash.feed.latest.bell.value)
