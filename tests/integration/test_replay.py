"""Record, replay, republish, analyze and report, end to end (real sockets on 127.0.0.1).

The central check: the figures ``labwatch analyze FILE --json`` computes from a recording are
exactly (bit for bit) those ``labwatch watch --record FILE --json`` printed live.  Left out of
the comparison, because a recording cannot hold them:

* wall-clock facts of the live process at its end: ``wall_time_s`` (how long watch ran),
  ``silence_s`` and ``source_silent`` (time since the last message, on the clock of the
  moment watch printed);
* live-process state: ``link`` (the ZeroMQ connection: disconnects, handshakes),
  ``stop_command`` (the reply of the source's control socket), and the live recorder's own
  counters ``recorded``, ``not_recorded`` and ``recording_error`` (checked against the
  file's record counts instead).

* timings of the analysis itself: ``visibility.solve_time_s`` (wall time of the LP solve,
  measured anew by every run).

``analyze`` adds ``recording`` (records, SHA-256, tail report), which watch does not print.
"""

from __future__ import annotations

import json
import resource
import shutil
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from labwatch.analysis import AnalysisConfig
from labwatch.cli_analyze import analyze_dict
from labwatch.engine import EngineConfig, MonitorEngine
from labwatch.recording import read_records
from labwatch.recording_summary import (
    LIVE_ONLY_FIELDS,
    TIMING_FIELDS,
    file_sha256,
    replay_comparable,
)
from labwatch.replay import demo_recording_path, replay_into, republish
from labwatch.summary import summary_dict
from labwatch.transport import Subscriber
from simulators.make_demo_recording import make_demo_recording
from tests.conftest import free_port

DEMO = demo_recording_path()

#: Fields of ``watch --json`` that depend on the live wall clock or process (see above).
NOT_REPRODUCIBLE = (
    "wall_time_s",
    "silence_s",
    "source_silent",
    "link",
    "stop_command",
    "recorded",
    "not_recorded",
    "recording_error",
)
#: Nested fields (key path) that measure the analysis's own run time.
TIMINGS = (("visibility", "solve_time_s"),)
#: Analysis options used on both sides of each comparison.
OPTIONS = ("--window", "5", "--epoch", "0.5")


def _one_json(proc, timeout: float = 60) -> dict:
    out, err = proc.communicate(timeout=timeout)
    assert proc.returncode == 0, err
    lines = [line for line in out.splitlines() if line.strip()]
    assert len(lines) == 1, out  # exactly one JSON object on stdout
    return json.loads(lines[0])


def _assert_same_figures(live: dict, replayed: dict) -> None:
    assert LIVE_ONLY_FIELDS == NOT_REPRODUCIBLE and TIMING_FIELDS == TIMINGS  # reviewed lists
    missing = set(live) - set(NOT_REPRODUCIBLE) - set(replayed)
    assert not missing, sorted(missing)
    a, b = replay_comparable(live), replay_comparable(replayed)
    for key in sorted(a):
        assert b[key] == a[key], key
    assert a == b


def _analyze_in_process(path, *options: str) -> dict:
    from labwatch.cli import build_parser
    from labwatch.cli_watch import engine_from_args

    args = build_parser().parse_args(["analyze", str(path), "--json", *options])
    engine = engine_from_args(args)
    result = replay_into(engine, path)
    return analyze_dict(result.final, result.health, result, file_sha256(path), engine)


def test_analyze_of_a_watch_recording_gives_the_live_figures(run_cli, tmp_path):
    ep = f"tcp://127.0.0.1:{free_port()}"
    rec = tmp_path / "live.lwrec"
    sim = run_cli(
        *("simulate", ep, "--settings", "random", "--seed", "5", "--duration", "40"),
        *("--speed", "5", "--faults", "malformed=0.05,drop=0.03,duplicate=0.03"),
    )
    try:
        live = _one_json(
            run_cli("watch", ep, "--record", str(rec), "--json", "--duration", "4", *OPTIONS)
        )
    finally:
        sim.kill()
    replayed = _one_json(run_cli("analyze", str(rec), "--json", *OPTIONS))
    # the live run saw data, rejections and gaps, so the comparison covers all of them
    assert live["coincidences"] > 5000 and live["messages"] > 50
    assert live["rejected"] > 0 and live["gaps"] > 0 and live["duplicates"] > 0
    assert live["chsh"]["value"] is not None
    _assert_same_figures(live, replayed)
    tail = replayed["recording"]["tail"]
    assert tail["status"] == "clean" and tail["bytes_lost"] == 0
    assert replayed["recording"]["messages"] == live["messages"] == live["recorded"]
    assert replayed["recording"]["not_recorded"] == live["not_recorded"] == 0
    assert "recording_error" not in live
    assert replayed["recording"]["verdict_changes"] == 0
    assert replayed["recording"]["sha256"] == file_sha256(rec)


def _limit_file_size(limit: int):
    def apply() -> None:  # runs in the child before exec; Python ignores SIGXFSZ
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    return apply


def test_record_command_records_everything_and_reports_disk_errors(run_cli, tmp_path):
    ep = f"tcp://127.0.0.1:{free_port()}"
    ok, small = tmp_path / "ok.lwrec", tmp_path / "small.lwrec"
    sim = run_cli("simulate", ep, "--duration", "40", "--speed", "4", "--faults", "malformed=0.05")
    try:
        full = run_cli("record", ep, str(ok), "--duration", "3.5", "--note", "test bench A")
        # a 40 kB file-size limit stands in for a full disk (EFBIG instead of ENOSPC)
        cut = run_cli(
            "record", ep, str(small), "--duration", "6", preexec_fn=_limit_file_size(40_000)
        )
        nothing = run_cli("record", ep, "/dev/full", "--duration", "1")
        out, err = full.communicate(timeout=60)
        cut_out, cut_err = cut.communicate(timeout=60)
        n_out, n_err = nothing.communicate(timeout=60)
    finally:
        sim.kill()
    assert full.returncode == 0, err
    lines = [line for line in out.splitlines() if line.startswith("record ")]
    assert len(lines) >= 2 and all("msgs" in line and "rejected" in line for line in lines)
    rec = read_records(ok)
    assert rec.intact and rec.header.metadata["note"] == "test bench A"
    summary = _one_json(run_cli("analyze", str(ok), "--json"))
    assert summary["messages"] == len(rec.records) > 20
    assert summary["rejected"] == sum(r.kind == "rejected" for r in rec.records) > 0
    assert f"{len(rec.records)} records" in err

    assert cut.returncode == 3, cut_err
    assert "File too large" in cut_err and "intact prefix" in cut_err
    prefix = read_records(small)
    assert prefix.damaged == () and prefix.tail.status == "clean" and len(prefix.records) >= 1
    assert prefix.tail.file_size <= 40_000

    assert nothing.returncode == 2, n_err
    assert "No space left on device" in n_err and "/dev/full" in n_err


def _prefix_summary(records, cut: int) -> dict:
    engine = MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False)))
    for r in records:
        if r.offset + r.length <= cut:
            engine.ingest(r.frames, r.received_wall)
    engine.flush()
    return summary_dict(engine.latest, engine.health())


def test_truncated_recording_reads_back_every_complete_record(run_cli, tmp_path):
    full = read_records(DEMO)
    size = full.tail.file_size
    data = Path(DEMO).read_bytes()
    rng = np.random.default_rng(31)
    cuts = sorted(int(c) for c in rng.integers(full.header.size + 1, size, size=6))
    for cut in cuts:
        path = tmp_path / f"cut-{cut}.lwrec"
        path.write_bytes(data[:cut])
        got = read_records(path)
        complete = [r for r in full.records if r.offset + r.length <= cut]
        assert [(r.kind, r.frames, r.received_wall) for r in got.records] == [
            (r.kind, r.frames, r.received_wall) for r in complete
        ]
        end = complete[-1].offset + complete[-1].length if complete else full.header.size
        assert got.damaged == ()
        assert got.tail.status == ("clean" if end == cut else "truncated")
        assert got.tail.offset == end and got.tail.bytes_lost == cut - end
        result = replay_into(
            MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False))), path
        )
        assert summary_dict(result.final, result.health) == _prefix_summary(full.records, cut)
    # the command line reports the damaged tail of one of them
    cut = cuts[len(cuts) // 2]
    out = _one_json(run_cli("analyze", str(tmp_path / f"cut-{cut}.lwrec"), "--json", "--no-lp"))
    tail = out["recording"]["tail"]
    assert tail["status"] == "truncated" and tail["file_size"] == cut
    assert tail["bytes_lost"] == cut - tail["offset"] > 0
    assert out["recording"]["complete"] is False
    expected = _prefix_summary(full.records, cut)
    assert {k: out[k] for k in expected} == json.loads(json.dumps(expected))


def test_republish_with_rejected_gives_watch_the_figures_of_the_file(run_cli):
    ep = f"tcp://127.0.0.1:{free_port()}"
    watch = run_cli("watch", ep, "--json", "--quiet", "--duration", "7", *OPTIONS)
    # watch needs about a second to start; the publisher waits 3 s after binding
    pub = run_cli(
        "replay", DEMO, "--publish", ep, "--fast", "--include-rejected", "--startup-delay", "3"
    )
    live = _one_json(watch)
    out, err = pub.communicate(timeout=30)
    assert pub.returncode == 0, err
    expected = _analyze_in_process(DEMO, *OPTIONS)
    _assert_same_figures(live, expected)
    assert live["rejected"] == 2 and live["gaps"] == 1


def _collect_republished(ep: str, curve=None, **kw):
    """Run ``republish(DEMO, ep, **kw)`` in a thread; return (result, frames received)."""
    sub = Subscriber(ep, curve=curve)  # connects (and retries) before the publisher binds
    got: list[list[bytes]] = []
    done = threading.Event()
    results = []

    def publish() -> None:
        try:
            results.append(republish(DEMO, ep, startup_delay_s=1.0, drain_s=1.0, **kw))
        finally:
            done.set()

    thread = threading.Thread(target=publish)
    thread.start()
    try:
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline and not (done.is_set() and not sub.socket.poll(300)):
            got.extend(sub.recv_batch(0.1))
    finally:
        thread.join(20)
        sub.close()
    assert not thread.is_alive(), "republish did not return (context term hung?)"
    (result,) = results
    return result, got


def test_republish_sends_the_accepted_messages_at_the_recorded_pace():
    ep = f"tcp://127.0.0.1:{free_port()}"
    t0 = time.monotonic()
    result, got = _collect_republished(ep, speed=60.0)
    records = read_records(DEMO).records
    accepted = [list(r.frames) for r in records if r.kind == "accepted"]
    assert result.sent == len(accepted) and result.skipped_rejected == 2
    assert got == accepted  # same frames, same order, rejected ones left out
    # 24 s recorded at speed 60: at least 0.4 s of sending (a lower bound, from the sleeps)
    assert result.elapsed_s >= 0.95 * result.recorded_span_s / 60.0
    assert time.monotonic() - t0 >= 1.0 + 0.95 * result.recorded_span_s / 60.0


def test_republish_over_curvezmq_reaches_an_authorised_monitor(tmp_path):
    from labwatch.cli import main
    from labwatch.security import ClientKeys, ServerKeys

    for where, name in (("source", "source"), ("monitors", "desk-2")):
        assert main(["keys", str(tmp_path / where), name]) == 0
    allowed = tmp_path / "allowed"
    allowed.mkdir()
    (allowed / "desk-2.key").write_bytes((tmp_path / "monitors" / "desk-2.key").read_bytes())
    server = ServerKeys(str(tmp_path / "source" / "source.key_secret"), str(allowed))
    curve = ClientKeys.from_files(
        str(tmp_path / "source" / "source.key"), str(tmp_path / "monitors" / "desk-2.key_secret")
    )
    ep = f"tcp://127.0.0.1:{free_port()}"
    result, got = _collect_republished(
        ep, curve=curve, speed="fast", include_rejected=True, server_keys=server
    )
    assert result.sent == result.records == len(got) == len(read_records(DEMO).records)


def test_one_minute_run_replays_to_the_same_figures(tmp_path):
    path = tmp_path / "minute.lwrec"
    config = EngineConfig(window_s=10.0, epoch_s=0.5, analysis=AnalysisConfig())  # LP on
    live = MonitorEngine(config)  # judges every message as the live monitor, LP included
    make_demo_recording(path, judge=live, duration_s=60.0)
    result = replay_into(MonitorEngine(config), path)
    assert result.recorded_span_s == pytest.approx(60.0, abs=0.01)
    assert replay_comparable(summary_dict(result.final, result.health)) == replay_comparable(
        summary_dict(live.latest, live.health())
    )
    assert result.final.figure("visibility") is not None  # the LP ran on both sides
    assert result.snapshots >= 100 and result.verdict_changes == 0
    # speed is measured in benchmarks/bench_replay.py; printed here for the log only
    print(f"1-minute run replayed in {result.elapsed_s:.3f} s: {result.speedup:.0f}x real time")


def test_paced_replay_command_prints_status_lines_and_the_same_json(run_cli):
    proc = run_cli("replay", DEMO, "--speed", "12", "--json", *OPTIONS)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    status = [line for line in err.splitlines() if line.startswith("run demo-2718")]
    assert len(status) >= 1  # 24 s at speed 12: a status line per wall second
    lines = [line for line in out.splitlines() if line.strip()]
    assert len(lines) == 1
    assert replay_comparable(json.loads(lines[0])) == replay_comparable(
        _analyze_in_process(DEMO, *OPTIONS)
    )


def test_demo_recording_is_reproducible(tmp_path):
    digest = make_demo_recording(tmp_path / "again.lwrec")
    assert digest == file_sha256(DEMO), (
        "the demo generator's output changed: rerun simulators/make_demo_recording.py"
    )


def test_report_command_writes_html_and_json(run_cli, tmp_path):
    src = tmp_path / "bench.lwrec"
    shutil.copy(DEMO, src)
    proc = run_cli("report", str(src), "--no-lp")
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    html_path, json_path = out.split()
    assert Path(html_path) == tmp_path / "bench-report" / "report.html"
    page = Path(html_path).read_text(encoding="utf-8")
    data = json.loads(Path(json_path).read_text(encoding="utf-8"))
    assert file_sha256(src) in page and data["provenance"]["sha256"] == file_sha256(src)
    assert page.count("<svg") >= 3 and "never replaces an interlock" in page
    assert data["provenance"]["recording"]["tail"]["status"] == "clean"
    assert data["final"]["chsh"]["value"] == pytest.approx(
        _analyze_in_process(src, "--no-lp")["chsh"]["value"], abs=0
    )
