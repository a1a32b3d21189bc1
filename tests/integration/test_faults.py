"""Faults of a real lab, on real sockets and processes: what the monitor detects and keeps.

Each test starts the simulated source (``labwatch simulate``) and/or the monitor
(``labwatch watch``) as separate processes on 127.0.0.1, injects one fault (SIGKILL, SIGSTOP,
a full disk, a burst past the high-water mark, ...) and checks the monitor's figures and
health counters.  docs/faults.md tabulates the outcomes.
"""

from __future__ import annotations

import json
import os
import resource
import signal
import socket
import subprocess
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from labwatch.analysis import AnalysisConfig
from labwatch.engine import EngineConfig, MonitorEngine
from labwatch.protocol import CountBatch, MessageRejected, parse_message
from labwatch.recording import read_records
from labwatch.transport import SocketOptions, Subscriber
from tests.conftest import free_port

# The simulator's default source: 50000 pairs/s, efficiency 0.25 per detector, so about
# 50000 * 0.25**2 = 3125 coincidences/s (simulators/catalog.py defaults).
DEFAULT_COINCIDENCE_HZ = 50000 * 0.25**2


def _ep() -> str:
    return f"tcp://127.0.0.1:{free_port()}"


def _json_of(proc: subprocess.Popen, timeout: float = 60) -> tuple[dict, str, int]:
    out, err = proc.communicate(timeout=timeout)
    lines = [line for line in out.splitlines() if line.strip()]
    assert len(lines) == 1, (out, err)
    return json.loads(lines[0]), err, proc.returncode


class _LineReader:
    """Collects a process's stderr lines with their arrival time (monotonic)."""

    def __init__(self, stream) -> None:
        self.lines: list[tuple[float, str]] = []
        self._stream = stream
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        for line in self._stream:
            self.lines.append((time.monotonic(), line.rstrip("\n")))

    def wait_for(self, text: str, timeout: float, after: float = 0.0) -> float | None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            for t, line in list(self.lines):
                if t >= after and text in line:
                    return t
            time.sleep(0.05)
        return None

    def join(self, timeout: float = 10) -> str:
        self._thread.join(timeout)
        return "\n".join(line for _, line in self.lines)


def _wait_listening(endpoint: str, timeout: float = 20.0) -> None:
    """Wait until something accepts TCP connections on the endpoint's port (the source has
    bound), so a subscriber connects at once instead of in libzmq's reconnect back-off."""
    host, port = endpoint.removeprefix("tcp://").rsplit(":", 1)
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            socket.create_connection((host, int(port)), timeout=0.5).close()
            return
        except OSError:
            time.sleep(0.05)
    raise AssertionError(f"nothing listens on {endpoint}")


def _engine() -> MonitorEngine:
    return MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False)))


def _drain_until_stopped(
    sub: Subscriber, engine: MonitorEngine, timeout: float, pause_s: float = 0.0
) -> list[list[bytes]]:
    """Receive into ``engine`` until the source's final 'stopped' status (or ``timeout``)."""
    frames_seen: list[list[bytes]] = []
    deadline = time.monotonic() + timeout
    while pause_s and time.monotonic() < deadline:
        first = sub.recv_batch(0.2, max_messages=1)
        if first:
            frames_seen += first
            engine.ingest(first[0], time.time())
            time.sleep(pause_s)  # a monitor busy elsewhere: the queues fill up
            break
    while time.monotonic() < deadline:
        for frames in sub.recv_batch(0.2):
            frames_seen.append(frames)
            engine.ingest(frames, time.time())
        if engine.last_status is not None and engine.last_status.state == "stopped":
            return frames_seen
    raise AssertionError("the source's final status never arrived")


def _parsed_data(frames_seen: list[list[bytes]]) -> list[CountBatch]:
    out = []
    for frames in frames_seen:
        try:
            msg = parse_message(frames)
        except MessageRejected:
            continue
        if isinstance(msg, CountBatch):
            out.append(msg)
    return out


# --------------------------------------------------------------------------- source faults


def test_publisher_killed_and_restarted_with_new_run(run_cli):
    """SIGKILL mid-run, restart with a new run id and a 10x lower rate: the monitor counts one
    restart, follows the new run, and none of the old run's counts leak into it."""
    ep = _ep()
    first = run_cli("simulate", ep, "--run-id", "run-A", "--seed", "1")
    watch = run_cli("watch", ep, "--json", "--duration", "5.5", "--no-lp", "--epoch", "0.5")
    seen = _LineReader(watch.stderr)
    assert seen.wait_for("run run-A", timeout=20), seen.join()
    first.send_signal(signal.SIGKILL)
    first.wait(10)
    killed_at = time.monotonic()
    run_cli("simulate", ep, "--run-id", "run-B", "--seed", "2", "--rate", "5000")
    out, _ = watch.communicate(timeout=40)
    seen.join()
    assert watch.returncode == 0, seen.join()
    res = json.loads(out)
    assert res["restarts"] == 1 and res["run"] == "run-B" and res["run_index"] == 1
    expected_hz = DEFAULT_COINCIDENCE_HZ / 10
    # Poisson counts over >= 1 s of run B: sqrt(312)/312 ~ 6 % per second; 35 % is > 5 sigma
    # and far from run A's 10x rate, which any mixing would pull the rate towards.
    assert abs(res["rates"]["coincidence_hz"] - expected_hz) < 0.35 * expected_hz, res["rates"]
    assert res["coincidences"] == int(np.sum(res["counts"]))
    # run B's cumulative counts cover at most the wall time since the kill (speed 1)
    assert 0 < res["live_time_s"] <= time.monotonic() - killed_at
    assert res["coincidences"] < 1.5 * expected_hz * res["live_time_s"]


def test_frozen_publisher_is_reported_as_silent(run_cli):
    """SIGSTOP: no data and no heartbeats.  The status line says NO DATA within the --silence
    threshold plus one status tick; after SIGCONT the figures flow again."""
    ep = _ep()
    sim = run_cli("simulate", ep, "--seed", "4")
    watch = run_cli(
        "watch", ep, "--json", "--duration", "6", "--no-lp", "--silence", "1.5", "--epoch", "0.5"
    )
    lines = _LineReader(watch.stderr)
    try:
        assert lines.wait_for("run ", timeout=20), lines.join()
        sim.send_signal(signal.SIGSTOP)
        frozen_at = time.monotonic()
        alarm = lines.wait_for("NO DATA for", timeout=6, after=frozen_at)
        # silence threshold 1.5 s + one 1 s status tick + 0.5 s scheduling slack
        assert alarm is not None and alarm - frozen_at <= 3.0, lines.join()
    finally:
        sim.send_signal(signal.SIGCONT)
        resumed_at = time.monotonic()
    out, _ = watch.communicate(timeout=30)
    text = lines.join()
    assert watch.returncode == 0, text
    after = [line for t, line in lines.lines if t > resumed_at + 0.2 and line.startswith("run ")]
    assert after, text  # a status line with figures and without NO DATA after SIGCONT
    res = json.loads(out)
    assert res["source_silent"] is False and res["silence_s"] < 1.5
    assert res["rejected"] == 0 and res["duplicates"] == 0


def test_frozen_publisher_dropped_by_zmtp_heartbeat(run_cli):
    """The connection layer notices a frozen source too: with a 0.2 s ZMTP heartbeat (0.6 s
    timeout) the subscriber's link drops within about a second of SIGSTOP, and libzmq
    reconnects by itself after SIGCONT."""
    ep = _ep()
    engine = _engine()
    with Subscriber(ep, options=SocketOptions(heartbeat_ms=200)) as sub:
        sim = run_cli("simulate", ep, "--seed", "4", "--speed", "2")
        deadline = time.monotonic() + 20
        while (engine.accepted < 5 or not sub.link.connected) and time.monotonic() < deadline:
            for frames in sub.recv_batch(0.1):
                engine.ingest(frames, time.time())
        assert sub.link.connected and engine.accepted >= 5
        sim.send_signal(signal.SIGSTOP)
        frozen_at = time.monotonic()
        try:
            while sub.link.disconnects == 0 and time.monotonic() < frozen_at + 5:
                for frames in sub.recv_batch(0.1):
                    engine.ingest(frames, time.time())
            dropped_after = time.monotonic() - frozen_at
            # 0.6 s heartbeat timeout + up to one 0.2 s interval + scheduling slack
            assert sub.link.disconnects >= 1 and dropped_after < 2.0, sub.link
            assert not sub.link.connected
            assert engine.silence_s(time.time()) >= 0.5
        finally:
            sim.send_signal(signal.SIGCONT)
        before = engine.accepted
        while time.monotonic() < frozen_at + 15 and (
            engine.accepted < before + 5 or not sub.link.connected  # the event may trail data
        ):
            for frames in sub.recv_batch(0.1):
                engine.ingest(frames, time.time())
        assert engine.accepted >= before + 5 and sub.link.connected, sub.link
    h = engine.health()
    # what the source sent while it was unreachable is lost, and counted
    assert h.rejected == 0 and h.duplicates == 0 and h.restarts == 0
    print(f"heartbeat drop after {dropped_after:.2f} s; {h.missing} missing in {h.gaps} gaps")


def test_monitor_restarted_while_source_runs(run_cli):
    """A second monitor joining a running source counts what it missed before its first
    message as missed_at_start, not as gaps; nothing is invented."""
    ep = _ep()
    run_cli("simulate", ep, "--seed", "5", "--duration", "20", "--speed", "2")
    first, _, rc1 = _json_of(run_cli("watch", ep, "--json", "--duration", "1.5", "--no-lp"))
    second, _, rc2 = _json_of(run_cli("watch", ep, "--json", "--duration", "1.5", "--no-lp"))
    assert rc1 == rc2 == 0
    assert second["run"] == first["run"]
    assert second["missed_at_start"] > first["missed_at_start"] >= 0
    # the second monitor started after the first had seen seq >= messages-1
    assert second["missed_at_start"] >= first["accepted"] - first["heartbeats"]
    for res in (first, second):
        assert res["gaps"] == 0 and res["missing"] == 0 and res["restarts"] == 0
        assert res["rejected"] == 0


def test_burst_beyond_high_water_mark_is_counted(run_cli):
    """Source flat out (no pacing, ~2.5 KB event messages), SNDHWM = RCVHWM = 50 and a
    monitor that stalls for 1 s after its first message: PUB drops silently, the monitor sees the gaps, and every sequence number is accounted
    for: received + missing + missed at start = the source's last seq + 1."""
    ep = _ep()
    engine = _engine()
    with Subscriber(ep, options=SocketOptions(rcvhwm=50)) as sub:
        run_cli(
            "simulate", ep, "--speed", "1e6", "--duration", "30", "--interval", "0.005",
            "--settings", "random", "--rate", "2e6", "--sndhwm", "50", "--seed", "6",
        )  # fmt: skip
        seen = _drain_until_stopped(sub, engine, timeout=40, pause_s=1.0)
    h = engine.health()
    data = _parsed_data(seen)
    last_seq = engine.last_status.last_seq
    assert last_seq >= 5_900  # 30 s of source time in 5 ms messages
    assert h.gaps > 0 and h.missing > 0, h
    assert h.duplicates == 0 and h.late == 0 and h.rejected == 0
    assert len(data) == engine.run.messages
    assert (
        engine.run.messages + h.missing + h.missed_at_start + engine.unseen_at_last_status
        == last_seq + 1
    )
    assert engine.run.counts.sum() == sum(b.trials for b in data)
    print(f"burst: {last_seq + 1} sent, {len(data)} received, {h.missing} missing in {h.gaps} gaps")


def test_reordered_and_duplicated_messages_counted_once(run_cli):
    """Reordered messages are accepted once (late), copies are rejected as duplicates; the
    cumulative counts equal the sum over distinct sequence numbers exactly."""
    ep = _ep()
    engine = _engine()
    run_cli(
        "simulate", ep, "--speed", "20", "--duration", "30", "--seed", "7",
        "--faults", "reorder=0.2,duplicate=0.2",
    )  # fmt: skip
    _wait_listening(ep)
    with Subscriber(ep) as sub:
        seen = _drain_until_stopped(sub, engine, timeout=30)
    h = engine.health()
    data = _parsed_data(seen)
    distinct = {b.seq: b for b in data}
    assert h.late > 0 and h.duplicates > 0
    assert h.duplicates == len(data) - len(distinct)
    assert dict(h.rejections_by_reason) == {"duplicate": h.duplicates}
    assert h.missing == 0  # each hold-back opened a gap that the late message refilled
    assert engine.run.messages == len(distinct)
    expected = sum(b.counts for b in distinct.values())
    np.testing.assert_array_equal(engine.run.counts, expected)


def test_source_clock_jumps_reset_the_window_and_keep_the_run(run_cli):
    """The source clock jumps back 10 s at seq 40 and forward 500 s at seq 80: both counted,
    the rolling window restarts each time, cumulative counts keep everything and snapshots
    keep coming after the backward jump."""
    ep = _ep()
    engine = _engine()
    snaps = []
    engine.subscribe(snaps.append)
    run_cli(
        "simulate", ep, "--speed", "20", "--duration", "12", "--seed", "8",
        "--faults", "jump=40:-10,jump=80:500",
    )  # fmt: skip
    _wait_listening(ep)  # the source sends 0.5 s after binding: we are subscribed by then
    with Subscriber(ep) as sub:
        seen = _drain_until_stopped(sub, engine, timeout=30)
    data = {b.seq: b for b in _parsed_data(seen)}
    assert set(range(120)) <= set(data), "a message was lost on loopback at 200 msg/s"
    run = engine.run
    assert run.clock_jumps_backward == 1 and run.clock_jumps_forward == 1
    assert engine.health().clock_jumps == 2
    np.testing.assert_array_equal(run.counts, sum(b.counts for b in data.values()))
    # the window holds only what came after the forward jump (30 s window > 2 s of data)
    np.testing.assert_array_equal(
        run.window.total, sum(b.counts for s, b in data.items() if s >= 80)
    )
    # epochs are cut on the new clock after the backward jump: at t_stop = -5, -4, -3 (and
    # maybe -2) s before the next jump; none without re-anchoring (the clock would have to
    # catch up 10 s first)
    assert sum(1 for s in snaps if s.health.clock_jumps == 1) >= 3


# --------------------------------------------------------------------------- recorder faults


def test_recording_monitor_killed_mid_write(run_cli, tmp_path):
    """``watch --record`` killed with SIGKILL: the file reads back without damage, every
    record is a complete message and replays through a fresh engine in order.

    (The byte-level kill test of the writer itself is tests/integration/test_recording_kill.py;
    this one kills the real monitor process while it receives a live stream.)
    """
    ep = _ep()
    path = tmp_path / "killed.lwrec"
    run_cli("simulate", ep, "--speed", "5", "--seed", "9")
    watch = run_cli("watch", ep, "--record", str(path), "--quiet", "--no-lp")
    deadline = time.monotonic() + 20
    while time.monotonic() < deadline and (not path.exists() or path.stat().st_size < 20_000):
        time.sleep(0.1)
    time.sleep(0.37)  # land the kill between timed flushes
    watch.send_signal(signal.SIGKILL)
    watch.wait(10)
    rec = read_records(path)
    assert rec.damaged == ()
    assert rec.tail.status in ("clean", "truncated")
    accepted = [r for r in rec.records if r.kind == "accepted"]
    assert len(accepted) > 20
    replay = _engine()
    seqs = []
    for r in accepted:
        msg = parse_message(r.frames)  # a complete, valid message or this raises
        if isinstance(msg, CountBatch):
            seqs.append(msg.seq)
        assert replay.ingest(list(r.frames), r.received_wall).accepted
    assert seqs == list(range(seqs[0], seqs[0] + len(seqs)))  # in order, no holes
    assert replay.health().gaps == 0 and replay.health().rejected == 0


def _mount_small_tmpfs(where: Path, size: str) -> bool:
    where.mkdir()
    try:
        r = subprocess.run(
            ["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(where)],
            capture_output=True,
            timeout=10,
        )
    except (OSError, subprocess.TimeoutExpired):
        return False
    return r.returncode == 0


def _limit_file_size() -> None:  # runs in the child before exec: files stop at 32 KiB
    resource.setrlimit(resource.RLIMIT_FSIZE, (32 * 1024, 32 * 1024))


def test_disk_full_while_recording(run_cli, tmp_path):
    """The recording's file system fills up mid-run (a 32 KiB tmpfs; where mounting is not
    allowed, a 32 KiB file-size limit): watch keeps monitoring with unchanged figures, shows
    the error in its status lines and JSON, exits 3, and the partial file reads back clean."""
    ep = _ep()
    disk = tmp_path / "small-disk"
    mounted = _mount_small_tmpfs(disk, "32k")
    try:
        run_cli("simulate", ep, "--speed", "10", "--seed", "10", "--duration", "100")
        extra = {} if mounted else {"preexec_fn": _limit_file_size}
        path = disk / "run.lwrec"
        watch = run_cli(
            "watch", ep, "--json", "--duration", "3", "--no-lp", "--record", str(path), **extra
        )
        res, err, rc = _json_of(watch)
        assert rc == 3, err
        expected_error = "No space left on device" if mounted else "File too large"
        assert expected_error in res["recording_error"], res["recording_error"]
        assert expected_error in err  # shown in the status lines (stderr with --json)
        # monitoring went on: far more messages than the 32 KiB could hold, none lost
        rec = read_records(path)
        assert rec.damaged == () and rec.tail.status == "clean"
        assert res["messages"] > 2 * len(rec.records) > 0
        assert res["gaps"] == 0 and res["rejected"] == 0 and res["missing"] == 0
        # the rate over >= 10 s of source time: ~30000 counts, 0.6 % Poisson; 10 % is loose
        assert (
            abs(res["rates"]["coincidence_hz"] - DEFAULT_COINCIDENCE_HZ)
            < 0.1 * DEFAULT_COINCIDENCE_HZ
        )
    finally:
        if mounted:
            subprocess.run(["umount", "-l", str(disk)], capture_output=True, timeout=10)


def test_recording_to_a_full_device_fails_at_once(run_cli):
    """/dev/full: the recording header cannot be written; watch refuses to start (exit 2)
    with the reason, instead of monitoring while the user believes it records."""
    if not os.path.exists("/dev/full"):
        pytest.skip("/dev/full is absent on this system")
    watch = run_cli("watch", _ep(), "--duration", "5", "--record", "/dev/full")
    out, err = watch.communicate(timeout=30)
    assert watch.returncode == 2
    assert "No space left on device" in err and "/dev/full" in err
