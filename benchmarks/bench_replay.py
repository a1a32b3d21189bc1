"""Benchmark replaying a recording (``replay_into``) against plain reads of the same file.

A recording of ``--minutes`` of the demo bench (``simulators/make_demo_recording.py`` with a
longer duration, the simulator's default pair rate and message interval unless changed) is
made in a temporary directory, then timed:

* ``read_records``: reading and checksumming every record (the baseline: no analysis);
* ``ingest only``: the records already in memory fed to ``MonitorEngine.ingest`` (no file);
* ``replay_into``, with the LP off and with the default analysis (LP on), reading the file.

For each it prints the wall time, the speed in recorded seconds per wall second ("x real
time") and the ratio to the ``read_records`` baseline.  The replays are checked to give the
figures of the engine that judged the messages while the file was written.

Run: ``.venv/bin/python benchmarks/bench_replay.py [--minutes 1] [--pair-rate 50000]``
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time

from labwatch.analysis import AnalysisConfig
from labwatch.engine import EngineConfig, MonitorEngine
from labwatch.recording import read_records
from labwatch.recording_summary import replay_comparable
from labwatch.replay import replay_into
from labwatch.summary import summary_dict
from simulators.make_demo_recording import make_demo_recording


def _engine(lp: bool) -> MonitorEngine:
    return MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=lp)))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=1.0, help="recorded minutes (default 1)")
    parser.add_argument(
        "--pair-rate", type=float, default=50_000.0, help="emitted pairs/s (default 50000)"
    )
    parser.add_argument(
        "--interval", type=float, default=0.1, help="source seconds per message (default 0.1)"
    )
    parser.add_argument("--repeat", type=int, default=3, help="best of N runs (default 3)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "bench.lwrec")
        live = {lp: _engine(lp) for lp in (False, True)}
        t0 = time.perf_counter()
        make_demo_recording(
            path,
            judge=live[True],
            duration_s=60.0 * args.minutes,
            pair_rate_hz=args.pair_rate,
            message_interval_s=args.interval,
        )
        made = time.perf_counter() - t0
        rec = read_records(path)
        for r in rec.records:  # the LP-off "live" engine, fed by hand
            live[False].ingest(r.frames, r.received_wall)
        live[False].flush()
        span = rec.records[-1].received_mono - rec.records[0].received_mono
        size = os.path.getsize(path)
        print(
            f"recording: {len(rec.records)} records, {size / 1e6:.2f} MB, {span:.0f} s recorded, "
            f"{live[True].latest.trials} coincidences (made in {made:.2f} s)"
        )

        def best(fn) -> float:
            times = []
            for _ in range(args.repeat):
                t = time.perf_counter()
                fn()
                times.append(time.perf_counter() - t)
            return min(times)

        def ingest_only() -> None:
            engine = _engine(False)
            for r in rec.records:
                engine.ingest(r.frames, r.received_wall)
            engine.flush()

        rows = [("read_records (baseline)", best(lambda: read_records(path)))]
        rows.append(("ingest only, LP off (records in memory)", best(ingest_only)))
        for lp in (False, True):
            results = []
            elapsed = best(lambda lp=lp, out=results: out.append(replay_into(_engine(lp), path)))
            same = replay_comparable(
                summary_dict(results[-1].final, results[-1].health)
            ) == replay_comparable(summary_dict(live[lp].latest, live[lp].health()))
            label = f"replay_into, LP {'on' if lp else 'off'}"
            rows.append((f"{label} ({'same figures' if same else 'FIGURES DIFFER'})", elapsed))
        base = rows[0][1]
        print(f"{'':46s} {'wall s':>9s} {'x real time':>12s} {'vs baseline':>12s}")
        for label, t in rows:
            print(f"{label:46s} {t:9.4f} {span / t:12.0f} {t / base:11.1f}x")


if __name__ == "__main__":
    main()
