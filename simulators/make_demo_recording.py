"""Regenerate ``labwatch/data/demo_run.lwrec``, the demo recording shipped with labwatch.

The scenario is invented: a polarization-entangled pair source on a test bench while the
operator finishes aligning Bob's half-wave plate (the misalignment relaxes with an 8 s time
constant and the visibility recovers from 0.90 to 0.97), CHSH analyzers with settings drawn
at random per trial, 24 s of source time cut into 0.2 s event messages, a heartbeat per
second.  Three faults are injected at fixed times so that the timeline has something to
show: a malformed copy of one message (rejected), a dropped message (a gap) and a duplicate
(rejected).

No socket is involved: messages are made with :func:`simulators.publisher.generate_message`
(the function the live publisher uses), judged by a :class:`labwatch.engine.MonitorEngine`
exactly as :class:`labwatch.session.LiveSession` judges them, and written with
:class:`labwatch.recording.RecordWriter` with receive times ``start + source time + 4 ms``
(an invented constant network latency).  The writer stamps its file header with the real
creation time; the header is then rewritten with the scenario's nominal start time so that
the file is byte-for-byte reproducible (for a given labwatch version, which the header also
records).

Run: ``.venv/bin/python simulators/make_demo_recording.py [--out PATH] [--check]``
(``--check`` regenerates into a temporary file and compares it with the shipped one).
"""

from __future__ import annotations

import argparse
import hashlib
import os
import sys
import tempfile
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from labwatch.analysis import AnalysisConfig
from labwatch.engine import EngineConfig, MonitorEngine
from labwatch.protocol import encode_status
from labwatch.recording import RecordWriter, read_records
from labwatch.recording_format import encode_header
from simulators.drift import drifting_polarization_source
from simulators.faults import malformed_variant
from simulators.publisher import PublisherConfig, generate_message

__all__ = ["DEFAULT_PATH", "DEMO", "make_demo_recording", "main"]

#: Where the shipped demo recording lives.
DEFAULT_PATH = Path(__file__).resolve().parents[1] / "labwatch" / "data" / "demo_run.lwrec"

#: Every parameter of the demo run (also stored in the recording's metadata).
DEMO = {
    "seed": 2718,
    "duration_s": 24.0,
    "message_interval_s": 0.2,
    "heartbeat_s": 1.0,
    "pair_rate_hz": 16000.0,
    "efficiency": 0.3,
    "dark_rate_hz": 150.0,
    "initial_misalignment_deg": 10.0,
    "alignment_time_s": 8.0,
    "initial_visibility": 0.90,
    "final_visibility": 0.97,
    "latency_s": 0.004,
    "start_wall": 1_900_000_000.0,  # nominal start, Unix seconds (2030-03-17)
    "start_mono": 50_000.0,
    "malformed_seq": 30,  # a bad-JSON copy is sent after this message
    "dropped_seq": 60,  # never sent: a gap of one message
    "duplicated_seq": 90,  # sent twice: the copy is rejected
}

SCENARIO_TEXT = (
    "Demo bench (invented): polarization-entangled pairs, operator finishing the alignment of "
    "Bob's half-wave plate, CHSH analyzers, settings drawn at random per trial; injected "
    "faults: one malformed message, one dropped, one duplicated."
)


def _messages(d: Mapping[str, Any]) -> list[tuple[float, list[bytes]]]:
    """``(source_time_received, frames)`` in sending order."""
    source = drifting_polarization_source(
        seed=d["seed"],
        initial_misalignment_deg=d["initial_misalignment_deg"],
        alignment_time_s=d["alignment_time_s"],
        initial_visibility=d["initial_visibility"],
        final_visibility=d["final_visibility"],
        pair_rate_hz=d["pair_rate_hz"],
        efficiency=d["efficiency"],
        dark_rate_hz=d["dark_rate_hz"],
    )
    cfg = PublisherConfig(
        source_id="bench-n",
        run_id="demo-2718",
        settings="random",
        message_interval_s=d["message_interval_s"],
        seed=d["seed"],
    )
    rng = np.random.default_rng(d["seed"])
    fault_rng = np.random.default_rng([d["seed"], 7])
    m_a, m_b = source.scenario.settings_a, source.scenario.settings_b
    q = np.full((m_a, m_b), 1.0 / (m_a * m_b))
    n_messages = round(d["duration_s"] / d["message_interval_s"])
    out: list[tuple[float, list[bytes]]] = []
    next_beat = 0.0
    for seq in range(n_messages):
        t0 = seq * d["message_interval_s"]
        if t0 >= next_beat - 1e-12:
            beat = encode_status(
                source=cfg.source_id, run=cfg.run_id, t=t0, state="running", last_seq=seq - 1
            )
            out.append((t0, beat))
            next_beat += d["heartbeat_s"]
        frames = generate_message(source, cfg, rng, cfg.run_id, seq, t0, q)
        t_recv = t0 + d["message_interval_s"]
        if seq == d["dropped_seq"]:
            continue
        out.append((t_recv, frames))
        if seq == d["malformed_seq"]:
            out.append((t_recv, malformed_variant(fault_rng, frames, "bad_json")))
        if seq == d["duplicated_seq"]:
            out.append((t_recv, frames))
    t_end = n_messages * d["message_interval_s"]
    stop = encode_status(
        source=cfg.source_id, run=cfg.run_id, t=t_end, state="stopped", last_seq=n_messages - 1
    )
    out.append((t_end, stop))
    return out


def make_demo_recording(
    path: str | os.PathLike[str],
    judge: MonitorEngine | None = None,
    **overrides: float,
) -> str:
    """Write the demo recording to ``path`` (must not exist); returns its SHA-256 (hex).

    Parameters
    ----------
    path : str or os.PathLike
        File to create.
    judge : MonitorEngine, optional
        The engine that judges each message as the live monitor would (its verdicts and
        reasons are recorded; afterwards it holds the "live" figures).  Default: an engine
        without the LP.
    **overrides
        Replace entries of :data:`DEMO` (e.g. ``duration_s=60`` for a longer run); the shipped
        file uses none.
    """
    unknown = set(overrides) - set(DEMO)
    if unknown:
        raise ValueError(f"unknown demo parameters {sorted(unknown)}; known: {sorted(DEMO)}")
    d = {**DEMO, **overrides}
    metadata = {
        "command": "simulators/make_demo_recording.py",
        "endpoint": "none (messages generated without a socket)",
        "scenario": SCENARIO_TEXT,
        "simulation": d,
    }
    # Judge each message as a live session would, so rejected records carry their reason.
    if judge is None:
        judge = MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False)))
    with RecordWriter(path, metadata=metadata, flush_interval_s=0.5) as writer:
        for t_recv, frames in _messages(d):
            wall = d["start_wall"] + t_recv + d["latency_s"]
            mono = d["start_mono"] + t_recv + d["latency_s"]
            result = judge.ingest(frames, wall)
            reason = (
                None
                if result.accepted or result.kind == "ignored"
                else f"{result.reason}: {result.detail}"
            )
            writer.write(frames, received_wall=wall, received_mono=mono, rejected_reason=reason)
    judge.flush()
    header_size = read_records(path).header.size
    header = encode_header(metadata, d["start_wall"], d["start_mono"])
    if len(header) != header_size:  # same metadata, same length: a mismatch is a bug
        raise RuntimeError(f"restamped header is {len(header)} bytes, expected {header_size}")
    with open(path, "r+b") as fh:
        fh.write(header)
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()


def main(argv: Sequence[str] | None = None) -> int:
    """Command-line entry point; returns the exit code."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=str(DEFAULT_PATH), help="file to write (replaced)")
    parser.add_argument(
        "--check", action="store_true", help="regenerate to a temp file and compare with --out"
    )
    args = parser.parse_args(argv)
    if args.check:
        with tempfile.TemporaryDirectory() as tmp:
            digest = make_demo_recording(os.path.join(tmp, "demo.lwrec"))
        with open(args.out, "rb") as fh:
            shipped = hashlib.sha256(fh.read()).hexdigest()
        same = digest == shipped
        print(f"regenerated {digest}\nshipped     {shipped}\n{'identical' if same else 'DIFFER'}")
        return 0 if same else 1
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    if out.exists():
        out.unlink()
    digest = make_demo_recording(out)
    rec = read_records(out)
    print(
        f"wrote {out} ({out.stat().st_size} bytes, {len(rec.records)} records, "
        f"tail {rec.tail.status}), SHA-256 {digest}"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
