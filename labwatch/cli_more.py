"""Registration of the commands beyond simulate/watch (each in its own module)."""

from __future__ import annotations

import argparse

from labwatch import (
    cli_analyze,
    cli_demo,
    cli_keys,
    cli_record,
    cli_replay,
    cli_report,
    cli_serve,
)

__all__ = ["add_commands", "dispatch"]

_COMMANDS: dict[str, object] = {}


def add_commands(sub: argparse._SubParsersAction) -> None:
    """Add the demo, record, replay, analyze, report and serve sub-commands."""
    cli_demo.add_demo(sub)
    _COMMANDS["demo"] = cli_demo.run_demo
    cli_record.add_record(sub)
    _COMMANDS["record"] = cli_record.run_record
    cli_replay.add_replay(sub)
    _COMMANDS["replay"] = cli_replay.run_replay
    cli_analyze.add_analyze(sub)
    _COMMANDS["analyze"] = cli_analyze.run_analyze
    cli_report.add_report(sub)
    _COMMANDS["report"] = cli_report.run_report
    cli_keys.add_keys(sub)
    _COMMANDS["keys"] = cli_keys.run_keys
    cli_serve.add_serve(sub)
    _COMMANDS["serve"] = cli_serve.run_serve


def dispatch(args: argparse.Namespace) -> int:
    """Run the sub-command ``args.command``."""
    run = _COMMANDS.get(args.command)
    if run is None:
        raise ValueError(f"unknown command {args.command!r}")
    return run(args)  # type: ignore[operator]
