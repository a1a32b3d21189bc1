"""``labwatch report FILE``: replay a recording and write an HTML report plus report.json.

The report (see :mod:`labwatch.report`) holds the final figures with their intervals and
assumption labels, the figures over time, the run's timeline, the stream health and the
provenance of the data: the file's SHA-256 and size, the labwatch version, the recording's
metadata and its tail report.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path
from typing import Any

__all__ = ["add_report", "default_out_dir", "run_report"]


def default_out_dir(path: str) -> str:
    """``run.lwrec`` -> ``run-report`` next to it."""
    p = Path(path)
    return str(p.with_name(f"{p.stem}-report"))


def add_report(sub: argparse._SubParsersAction) -> None:
    from labwatch.cli_options import add_analysis_options

    p = sub.add_parser(
        "report",
        help="write a self-contained HTML report (and report.json) of a recording",
        description="Replay a recording through the live analysis and write DIR/report.html "
        "(figures as inline SVG, timeline, provenance) and DIR/report.json (the same figures).",
    )
    p.add_argument("file", help="recording file (.lwrec)")
    p.add_argument(
        "--out",
        default=None,
        metavar="DIR",
        help="output directory (default: FILE without .lwrec plus '-report', next to it)",
    )
    p.add_argument("--title", default=None, help="page title (default from the file name)")
    add_analysis_options(p)
    p.add_argument("--no-progress", action="store_true", help="no progress bar on stderr")


def provenance(args: argparse.Namespace, result: Any, sha256: str) -> dict[str, Any]:
    """Provenance facts of a replayed recording (file, digest, metadata, tail, options)."""
    from labwatch.cli_analyze import analysis_options_dict
    from labwatch.recording_summary import recording_dict

    meta = result.header.metadata
    scenario = meta.get("scenario") or meta.get("note")
    created = result.header.created_wall
    return {
        "file": os.path.abspath(args.file),
        "file_bytes": os.path.getsize(args.file),
        "sha256": sha256,
        "created_wall": created,
        "created": time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(created)),
        "scenario": scenario,
        "metadata": meta,
        "recording": recording_dict(result, sha256),
        "analysis": analysis_options_dict(args),
    }


def run_report(args: argparse.Namespace) -> int:
    """Run ``report``; prints the paths written."""
    from labwatch.cli_analyze import progress_bar
    from labwatch.cli_watch import engine_from_args
    from labwatch.recording_summary import file_sha256
    from labwatch.replay import replay_into
    from labwatch.report import ReportCollector, report_data, write_report

    engine = engine_from_args(args)
    collector = ReportCollector()
    engine.subscribe(collector)
    update, close = progress_bar("replay", enabled=False if args.no_progress else None)
    try:
        result = replay_into(engine, args.file, progress=update)
    finally:
        close()
    sha = file_sha256(args.file)
    data = report_data(
        collector, result.final, result.health, provenance(args, result, sha), title=args.title
    )
    files = write_report(args.out or default_out_dir(args.file), data)
    print(files.html)
    print(files.json)
    tail = result.tail.status if result.tail is not None else "unknown"
    print(
        f"report: {result.records} records, {collector.snapshots} snapshots, tail {tail}",
        file=sys.stderr,
    )
    return 0
