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


#: sub-command -> (module, its parser hook, its runner)
_TABLE = (
    ("demo", cli_demo, "add_demo", "run_demo"),
    ("record", cli_record, "add_record", "run_record"),
    ("replay", cli_replay, "add_replay", "run_replay"),
    ("analyze", cli_analyze, "add_analyze", "run_analyze"),
    ("report", cli_report, "add_report", "run_report"),
    ("keys", cli_keys, "add_keys", "run_keys"),
    ("serve", cli_serve, "add_serve", "run_serve"),
)


def add_commands(sub: argparse._SubParsersAction) -> None:
    """Add the demo, record, replay, analyze, report, keys and serve sub-commands."""
    for name, module, add, run in _TABLE:
        getattr(module, add)(sub)
        _COMMANDS[name] = getattr(module, run)


def dispatch(args: argparse.Namespace) -> int:
    """Run the sub-command ``args.command``."""
    run = _COMMANDS.get(args.command)
    if run is None:
        raise ValueError(f"unknown command {args.command!r}")
    return run(args)  # type: ignore[operator]
