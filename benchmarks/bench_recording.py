"""Benchmark the recording writer and reader against plain file I/O of the same bytes.

Each scenario writes ``--n`` synthetic three-frame messages (topic, small JSON header,
binary payload) and prints records/s and MB/s for

* ``RecordWriter.write`` (default 0.5 s flush interval, close with fsync included), next
  to a baseline that writes the same frame bytes with ``file.write`` on a buffered file;
* iterating a ``RecordReader`` (checksums verified, records built), next to a baseline that reads the
  raw frame file back in 1 MiB chunks.

MB/s counts frame bytes only (what the monitor received), so both columns measure the
same payload.  The ratio column is recording time / baseline time.

Run: ``.venv/bin/python benchmarks/bench_recording.py [--n 100000] [--dir /tmp]``
"""

from __future__ import annotations

import argparse
import json
import os
import random
import tempfile
import time

from labwatch.recording import RecordReader, RecordWriter


def make_messages(n: int, payload: int, seed: int = 1) -> list[list[bytes]]:
    """``n`` messages: topic, JSON header, ``payload`` bytes of counts."""
    rng = random.Random(seed)
    blob = rng.randbytes(payload)
    out = []
    for i in range(n):
        header = json.dumps({"seq": i, "run": 12, "shape": [2, 2, 2, 2]}).encode()
        out.append([b"counts", header, blob])
    return out


def bench_write(path: str, messages: list[list[bytes]]) -> float:
    t0 = time.perf_counter()
    with RecordWriter(path, metadata={"endpoint": "tcp://127.0.0.1:5599"}) as w:
        write = w.write
        for i, frames in enumerate(messages):
            # a realistic caller takes both clocks per message
            write(
                frames,
                received_wall=time.time(),
                received_mono=time.monotonic(),
                rejected_reason=None if i % 100 else "simulated bad header",
            )
    return time.perf_counter() - t0


def bench_write_baseline(path: str, messages: list[list[bytes]]) -> float:
    t0 = time.perf_counter()
    with open(path, "xb") as fh:
        write = fh.write
        for frames in messages:
            time.time()
            time.monotonic()
            for f in frames:
                write(f)
        fh.flush()
        os.fsync(fh.fileno())
    return time.perf_counter() - t0


def bench_read(path: str) -> tuple[float, int]:
    # iterate as a replay does; read_records() would also hold every frame in memory
    t0 = time.perf_counter()
    count = 0
    with RecordReader(path) as reader:
        for _ in reader:
            count += 1
    dt = time.perf_counter() - t0
    assert reader.tail is not None and reader.tail.clean and not reader.damaged
    return dt, count


def bench_read_baseline(path: str) -> float:
    t0 = time.perf_counter()
    with open(path, "rb") as fh:
        while fh.read(1 << 20):
            pass
    return time.perf_counter() - t0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=100_000, help="messages per scenario")
    parser.add_argument("--dir", default=None, help="directory for the temporary files")
    args = parser.parse_args()
    print(f"{'scenario':<22}{'what':<7}{'recording':>26}{'plain file':>26}{'ratio':>8}")
    for payload in (128, 8192):
        messages = make_messages(args.n, payload)
        frame_bytes = sum(len(f) for m in messages for f in m)
        with tempfile.TemporaryDirectory(dir=args.dir) as tmp:
            rec_path = os.path.join(tmp, "bench.lwrec")
            raw_path = os.path.join(tmp, "bench.raw")
            tw = bench_write(rec_path, messages)
            tb = bench_write_baseline(raw_path, messages)
            tr, count = bench_read(rec_path)
            trb = bench_read_baseline(raw_path)
            overhead = os.path.getsize(rec_path) / os.path.getsize(raw_path) - 1
        assert count == args.n
        name = f"{args.n} x {payload} B"
        for what, t, base in (("write", tw, tb), ("read", tr, trb)):
            rec_s = f"{args.n / t:>10.0f} rec/s {frame_bytes / t / 1e6:>7.1f} MB/s"
            base_s = f"{args.n / base:>10.0f} rec/s {frame_bytes / base / 1e6:>7.1f} MB/s"
            print(f"{name:<22}{what:<7}{rec_s:>26}{base_s:>26}{t / base:>7.1f}x")
        print(f"{'':<22}file size overhead of the format: {overhead:.1%}")


if __name__ == "__main__":
    main()
