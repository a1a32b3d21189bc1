"""``labwatch replay FILE``: play a recording back, into a local monitor or onto a PUB socket.

Without ``--publish`` the recording is fed to a local engine (the live code path) at the
recorded pace times ``--speed`` (or as fast as possible with ``--fast``) and the status line
of ``watch`` is printed once per wall second.  With ``--publish ENDPOINT`` the recorded
messages are sent again from a PUB socket bound there, at the same pace, for any monitor to
subscribe to.
"""

from __future__ import annotations

import argparse
import json
import math
import sys

__all__ = ["add_replay", "run_replay"]


def add_replay(sub: argparse._SubParsersAction) -> None:
    from labwatch.cli import _add_security, _positive
    from labwatch.cli_options import add_analysis_options

    p = sub.add_parser(
        "replay",
        help="play a recording back: status lines at the recorded pace, or republish it",
        description="Replay a recording into a local monitor (status lines as watch prints "
        "them) or, with --publish, republish its messages on a PUB socket.",
    )
    p.add_argument("file", help="recording file (.lwrec)")
    pace = p.add_mutually_exclusive_group()
    pace.add_argument(
        "--speed",
        type=_positive,
        default=1.0,
        help="recorded seconds per wall second (default 1: the recorded pace)",
    )
    pace.add_argument("--fast", action="store_true", help="as fast as possible")
    p.add_argument(
        "--publish",
        default=None,
        metavar="ENDPOINT",
        help="bind a PUB socket here and republish the messages instead of analysing them",
    )
    p.add_argument(
        "--include-rejected",
        action="store_true",
        help="with --publish: also send the messages the live monitor rejected",
    )
    p.add_argument(
        "--startup-delay",
        type=float,
        default=0.5,
        help="with --publish: seconds between binding and the first message (default 0.5)",
    )
    add_analysis_options(p)
    p.add_argument(
        "--json",
        action="store_true",
        help="without --publish: print the final figures as one JSON object (as analyze "
        "--json; status lines go to stderr)",
    )
    p.add_argument("--quiet", action="store_true", help="no per-second lines")
    _add_security(p, server=True)


def _speed(args: argparse.Namespace) -> float:
    return math.inf if args.fast else args.speed


def _summary(kind: str, result, pace: float) -> str:
    speed = "as fast as possible" if math.isinf(pace) else f"speed {pace:g}"
    rate = "" if result.elapsed_s <= 0 else f", {result.recorded_span_s / result.elapsed_s:.1f}x"
    tail = "stopped early" if result.tail is None else f"tail {result.tail.status}"
    return (
        f"{kind}: {result.records} records, {result.recorded_span_s:.1f} s recorded, "
        f"replayed in {result.elapsed_s:.2f} s ({speed}{rate}); {tail}"
    )


def _run_publish(args: argparse.Namespace, pace: float) -> int:
    from labwatch.cli_analyze import progress_bar
    from labwatch.replay import republish

    server_keys = None
    if getattr(args, "server_key", None):
        from labwatch.security import ServerKeys

        server_keys = ServerKeys(args.server_key, args.allowed_keys)
    elif getattr(args, "allowed_keys", None):
        raise ValueError("--allowed-keys needs --server-key (this source's .key_secret file)")

    def tick(sent: int, records: int) -> None:
        if not args.quiet:
            print(f"republish: {sent} messages sent ({records} records read)", flush=True)

    update, close = progress_bar("republish", enabled=False if not math.isinf(pace) else None)
    try:
        result = republish(
            args.file,
            args.publish,
            pace,
            include_rejected=args.include_rejected,
            startup_delay_s=args.startup_delay,
            progress=update,
            on_tick=tick,
            server_keys=server_keys,
        )
    finally:
        close()
    print(
        _summary("republish", result, pace)
        + f"; {result.sent} sent, {result.skipped_rejected} rejected ones skipped",
        file=sys.stderr,
    )
    return 0


def run_replay(args: argparse.Namespace) -> int:
    """Run ``replay``; 0 on success (a damaged file is replayed up to its intact records)."""
    from labwatch.cli_analyze import analyze_dict, progress_bar
    from labwatch.cli_watch import engine_from_args
    from labwatch.recording_summary import file_sha256
    from labwatch.replay import replay_into
    from labwatch.summary import status_line

    pace = _speed(args)
    if args.publish:
        return _run_publish(args, pace)
    out = sys.stderr if args.json else sys.stdout

    def tick(snapshot, health) -> None:
        if not args.quiet:
            print(status_line(snapshot, health), file=out, flush=True)

    engine = engine_from_args(args)
    # A progress bar only when no status lines are printed at the recorded pace.
    update, close = progress_bar("replay", enabled=False if not math.isinf(pace) else None)
    try:
        result = replay_into(engine, args.file, progress=update, speed=pace, on_tick=tick)
    finally:
        close()
    if args.json:
        out_json = analyze_dict(result.final, result.health, result, file_sha256(args.file), engine)
        print(json.dumps(out_json, allow_nan=False))
    elif not args.quiet:
        print(status_line(result.final, result.health), flush=True)
    print(_summary("replay", result, pace), file=sys.stderr)
    return 0
