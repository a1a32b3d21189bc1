"""``labwatch analyze FILE``: replay a recording as fast as possible and print the final figures.

The figures are those ``labwatch watch`` showed live (same engine, same options), so
``analyze --json`` prints the object ``watch --json`` printed, bit for bit, without the fields
that depend on the live wall clock (``wall_time_s``, ``silence_s``, ``source_silent``) or on
the live process (``link``, ``stop_command``, the recorder's ``recorded``, ``not_recorded``
and ``recording_error``), plus ``"recording"``: what the file held, its SHA-256 and its tail
report.  Apart from timings of the analysis itself (``visibility.solve_time_s``, the LP's
wall time), the object depends on the file and the options only.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from collections.abc import Callable
from typing import Any

from labwatch.cli_options import add_analysis_options
from labwatch.engine import MonitorEngine
from labwatch.replay import ProgressCallback, ReplayResult, replay_into
from labwatch.snapshot import Snapshot, StreamHealth, to_jsonable

__all__ = [
    "add_analyze",
    "analysis_options_dict",
    "analyze_dict",
    "progress_bar",
    "run_analyze",
]


def analysis_options_dict(args: argparse.Namespace) -> dict[str, Any]:
    """The analysis options as given, for provenance."""
    return {
        "window_s": args.window,
        "epoch_s": args.epoch,
        "functional": args.functional,
        "visibility_lp": not args.no_lp,
        "bootstrap": args.bootstrap,
        "target": args.target,
    }


def progress_bar(
    desc: str, enabled: bool | None = None
) -> tuple[ProgressCallback, Callable[[], None]]:
    """A tqdm bar on stderr over the bytes of a recording: ``(callback, close)``.

    ``enabled=None`` shows it only when stderr is a terminal (tqdm's own rule).
    """
    from tqdm import tqdm

    bar = tqdm(
        total=0,
        desc=desc,
        unit="B",
        unit_scale=True,
        file=sys.stderr,
        disable=None if enabled is None else not enabled,
        leave=False,
    )

    def update(done: int, total: int) -> None:
        if bar.total != total:
            bar.total = total
        bar.update(done - bar.n)

    return update, bar.close


#: Engine attributes that ``watch --json`` prints besides the summary and that a replay
#: reproduces (they follow from the messages alone).
_ENGINE_FIELDS = ("unseen_at_last_status",)


def analyze_dict(
    final: Snapshot | None,
    health: StreamHealth,
    result: ReplayResult,
    sha256: str | None,
    engine: MonitorEngine | None = None,
) -> dict[str, Any]:
    """The ``analyze --json`` object: the watch summary plus ``"recording"``."""
    from labwatch.recording_summary import recording_dict
    from labwatch.summary import summary_dict

    out = summary_dict(final, health)
    for name in _ENGINE_FIELDS:
        if engine is not None and hasattr(engine, name):
            out[name] = to_jsonable(getattr(engine, name))
    target = out.get("target")
    out["target_met"] = bool(isinstance(target, dict) and target.get("met"))
    out["recording"] = recording_dict(result, sha256)
    return out


def add_analyze(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "analyze",
        help="replay a recording as fast as possible and print the final figures",
        description="Replay a recording through the live analysis and print the final figures "
        "(the same as watch printed live with the same options).",
    )
    p.add_argument("file", help="recording file (.lwrec)")
    p.add_argument(
        "--json",
        action="store_true",
        help="print exactly one JSON object: the watch --json figures plus 'recording' "
        "(records, SHA-256, damaged regions, tail report)",
    )
    add_analysis_options(p)
    p.add_argument("--no-progress", action="store_true", help="no progress bar on stderr")


def _print_human(out: dict[str, Any], final: Snapshot | None, health: StreamHealth) -> None:
    from labwatch.summary import status_line

    rec = out["recording"]
    tail = rec["tail"]
    print(status_line(final, health))
    print(
        f"recording: {rec['records']} records ({rec['accepted_records']} accepted, "
        f"{rec['rejected_records']} rejected messages, {rec['annotations']} annotations), "
        f"{rec['recorded_span_s']:.1f} s recorded"
    )
    if rec["damaged"]:
        print(f"damaged: {len(rec['damaged'])} region(s) skipped in the middle of the file")
    print(f"tail: {tail['status']} ({tail['bytes_lost']} bytes lost): {tail['reason']}")
    print(f"sha256: {rec['sha256']}")


def run_analyze(args: argparse.Namespace) -> int:
    """Run ``analyze``; 0 on success (also for a damaged file: the damage is reported)."""
    from labwatch.cli_watch import engine_from_args
    from labwatch.recording_summary import file_sha256

    engine = engine_from_args(args)
    update, close = progress_bar("analyze", enabled=False if args.no_progress else None)
    try:
        result = replay_into(engine, args.file, progress=update)
    finally:
        close()
    out = analyze_dict(result.final, result.health, result, file_sha256(args.file), engine)
    if args.json:
        print(json.dumps(out, allow_nan=False))
    else:
        _print_human(out, result.final, result.health)
    speed = "instant" if math.isinf(result.speedup) else f"{result.speedup:.0f}x real time"
    print(
        f"analyze: {result.records} records in {result.elapsed_s:.2f} s ({speed})",
        file=sys.stderr,
    )
    return 0
