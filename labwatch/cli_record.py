"""``labwatch record ENDPOINT FILE``: record a stream to a file, as a process of its own.

Recording and monitoring can run as separate processes (on separate hosts): this command
subscribes, tees every message to an append-only recording and does no analysis worth the
name (an engine without the LP and with hour-long epochs; it still validates each message so
that rejected ones are stored with their reason, as ``watch --record`` stores them).

Exit codes
----------
0
    The recording ran to its end (``--duration``, Ctrl-C or SIGTERM) and was closed cleanly.
3
    A write error (disk full, I/O error) stopped the recording early; the file holds an
    intact prefix of what was received (every record up to the failure reads back).  The
    same code as ``watch --record`` uses for a recording that failed mid-run.
2
    Nothing could be recorded: bad endpoint or options, the file exists or cannot be
    created, or writing failed before the first message was stored.
"""

from __future__ import annotations

import argparse
import math
import signal
import sys
import time

__all__ = ["EXIT_NOTHING_RECORDED", "EXIT_PARTIAL", "add_record", "run_record"]

#: Exit code: the recording stopped early on a write error; the file holds an intact prefix.
EXIT_PARTIAL = 3
#: Exit code: nothing could be recorded.
EXIT_NOTHING_RECORDED = 2


def add_record(sub: argparse._SubParsersAction) -> None:
    from labwatch.cli import _add_security, _positive

    p = sub.add_parser(
        "record",
        help="record every message of a stream to a new file (no analysis)",
        description="Record every message received from ENDPOINT to FILE, with its receive "
        "time and, for rejected messages, the reason. Prints one line per second.",
        epilog="Exit codes: 0 recorded to the end; 3 a write error (disk full) stopped the "
        "recording early, the file holds an intact prefix; 2 nothing could be recorded.",
    )
    p.add_argument("endpoint", help="publisher endpoint, e.g. tcp://127.0.0.1:5780")
    p.add_argument("file", help="recording to create (an existing file is never overwritten)")
    p.add_argument(
        "--duration",
        type=_positive,
        default=math.inf,
        help="stop after this many wall seconds (default: until Ctrl-C or SIGTERM)",
    )
    p.add_argument(
        "--note",
        default=None,
        help="free text stored in the file header (setup, sample, operator)",
    )
    p.add_argument(
        "--flush",
        type=_positive,
        default=0.5,
        help="seconds at most between handing records to the OS (default 0.5)",
    )
    p.add_argument("--quiet", action="store_true", help="no per-second lines")
    _add_security(p, server=False)


def _size(n: int) -> str:
    for unit in ("B", "kB", "MB", "GB"):
        if n < 1000 or unit == "GB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000  # type: ignore[assignment]
    return f"{n} B"  # pragma: no cover


def run_record(args: argparse.Namespace) -> int:
    """Run ``record``; see the module docstring for the exit codes."""
    from labwatch.analysis import AnalysisConfig
    from labwatch.cli_watch import client_keys_from_args
    from labwatch.engine import EngineConfig, MonitorEngine
    from labwatch.recording import RecordingError, RecordWriter
    from labwatch.session import LiveSession
    from labwatch.transport import check_endpoint

    check_endpoint(args.endpoint)
    curve = client_keys_from_args(args)
    # Validation only: no LP, one analysis epoch per hour of source time.
    engine = MonitorEngine(
        EngineConfig(epoch_s=3600.0, analysis=AnalysisConfig(visibility=False, best_pair=False))
    )
    metadata = {"endpoint": args.endpoint, "command": "record"}
    if args.note:
        metadata["note"] = args.note
    writer = RecordWriter(args.file, metadata=metadata, flush_interval_s=args.flush)
    session = LiveSession(args.endpoint, engine, recorder=writer, curve=curve)
    started = time.monotonic()
    last = {"t": started, "messages": 0}

    def on_term(signum: int, frame: object) -> None:
        session.stop()

    previous = signal.signal(signal.SIGTERM, on_term)

    def tick(snapshot: object, health) -> bool:
        now = time.monotonic()
        if not args.quiet:
            st = writer.stats
            rate = (health.messages - last["messages"]) / max(now - last["t"], 1e-9)
            errors = f"rejected {health.rejected}"
            if health.missing:
                errors += f" | missing {health.missing} in {health.gaps} gaps"
            line = (
                f"record {now - started:6.0f} s | msgs {health.messages} ({rate:.0f}/s) | "
                f"{_size(st.bytes_flushed + st.bytes_buffered)} | {errors}"
            )
            if session.recording_error:
                line += f" | {session.recording_error}"
            print(line, flush=True)
        last["t"], last["messages"] = now, health.messages
        return session.recording_error is not None

    interrupted = False
    try:
        session.run_blocking(args.duration, on_tick=tick)
    except KeyboardInterrupt:
        interrupted = True
    finally:
        signal.signal(signal.SIGTERM, previous)
        close_error = None
        try:
            writer.close()
        except RecordingError as exc:
            close_error = f"recording stopped: {exc}"
    error = session.recording_error or close_error
    st = writer.stats
    how = "interrupted" if interrupted else ("stopped by a write error" if error else "done")
    print(
        f"record: {how}; {st.records_flushed} records, {_size(st.bytes_flushed)} in {args.file} "
        f"({engine.messages} messages received, {engine.rejected} rejected)",
        file=sys.stderr,
    )
    if error is None:
        return 0
    print(f"labwatch record: {error}", file=sys.stderr)
    if st.records_flushed == 0:
        print("labwatch record: nothing could be recorded", file=sys.stderr)
        return EXIT_NOTHING_RECORDED
    print(
        f"labwatch record: the file holds an intact prefix of {st.records_flushed} records",
        file=sys.stderr,
    )
    return EXIT_PARTIAL
