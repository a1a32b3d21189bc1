"""A real process records continuously and is killed with SIGKILL mid-run.

Every record the child reported as flushed, and every other complete record, must read
back byte for byte; the end of the file must be reported (clean or truncated), never
raise.  Concurrent reads while the child is writing must see a prefix of the stream.
"""

from __future__ import annotations

import os
import random
import select
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from labwatch.recording import read_records

ROOT = Path(__file__).resolve().parents[2]

# The child regenerates record i from i alone, so the parent knows what every record
# must contain.  Record kinds: annotation every 50th, rejected when i % 10 == 7.
RECORD_SPEC = r"""
import json, random

def expected(i, big):
    if i % 50 == 0:
        return ("annotation", f"note {i}: new run segment", ())
    rng = random.Random(i)
    n = rng.choice([2**22, 0, 17]) if big else rng.randrange(0, 1500)
    frames = (b"counts", json.dumps({"seq": i, "run": 4}).encode(), rng.randbytes(n), b"")
    if i % 10 == 7:
        return ("rejected", f"seq {i}: simulated malformed header", frames)
    return ("accepted", None, frames)
"""

CHILD = (
    RECORD_SPEC
    + r"""
import sys, time
from labwatch.recording import RecordWriter

path, big = sys.argv[1], sys.argv[2] == "big"
interval = 0.0 if big else 0.05
w = RecordWriter(path, metadata={"endpoint": "tcp://127.0.0.1:5599", "child": True},
                 flush_interval_s=interval)
i = 0
while True:
    kind, text, frames = expected(i, big)
    if kind == "annotation":
        w.annotate(text)
    else:
        w.write(frames, received_wall=time.time(), received_mono=time.monotonic(),
                rejected_reason=text)
    i += 1
    if i % (4 if big else 200) == 0:
        w.flush()
        print(i, flush=True)  # all records before i are with the OS now
        time.sleep(0.001)
"""
)

namespace: dict = {}
exec(RECORD_SPEC, namespace)  # noqa: S102 - our own constant source, shared with the child
expected = namespace["expected"]


def _check_prefix(path: Path, big: bool) -> tuple:
    rec = read_records(path)
    assert rec.damaged == ()
    assert rec.tail.status in ("clean", "truncated"), rec.tail
    last_mono = -1.0
    for i, r in enumerate(rec.records):
        kind, text, frames = expected(i, big)
        assert r.index == i
        assert r.kind == kind
        assert r.frames == frames
        if kind == "rejected":
            assert r.rejected_reason == text
        if kind == "annotation":
            assert r.annotation == text
        assert r.received_mono >= last_mono
        last_mono = r.received_mono
    end = rec.records[-1].offset + rec.records[-1].length if rec.records else rec.header.size
    assert rec.tail.offset == end
    assert rec.tail.bytes_lost == rec.tail.file_size - end
    return rec


@pytest.mark.parametrize("mode", ["small", "big"])
def test_sigkill_mid_run_loses_only_the_unflushed_tail(tmp_path, mode):
    big = mode == "big"
    path = tmp_path / f"killed-{mode}.lwrec"
    env = dict(os.environ, PYTHONPATH=str(ROOT), PYTHONUNBUFFERED="1")
    proc = subprocess.Popen(
        [sys.executable, "-c", CHILD, str(path), mode],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        env=env,
        cwd=ROOT,
    )
    flushed = 0
    reads = 0
    try:
        target = 40 if big else 6000
        deadline = time.monotonic() + 30.0  # generous: a loaded CI box starts Python slowly
        while flushed < target and time.monotonic() < deadline:
            ready, _, _ = select.select([proc.stdout], [], [], 1.0)
            if not ready:
                assert proc.poll() is None, proc.stderr.read().decode()
                continue
            line = proc.stdout.readline()
            assert line, proc.stderr.read().decode()
            flushed = int(line)
            if flushed >= target // 3 * (reads + 1) and reads < 2:
                # read while the child keeps writing: a prefix with a clean/truncated tail
                rec = _check_prefix(path, big)
                assert len(rec.records) >= flushed
                reads += 1
        assert flushed >= target, "the child did not get going in time"
        # land the kill at a random point of the child's loop (for "big", often inside a
        # multi-MiB write, which the kernel then leaves partly done)
        time.sleep(random.Random().uniform(0.0, 0.02))
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(10)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
        proc.stdout.close()
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL
    rec = _check_prefix(path, big)
    assert len(rec.records) >= flushed
    assert rec.header.metadata["child"] is True
    print(
        f"{mode}: {len(rec.records)} records recovered, child reported {flushed} flushed, "
        f"tail {rec.tail.status} ({rec.tail.bytes_lost} bytes lost)"
    )
