"""Registration of the commands beyond simulate/watch (each in its own module)."""

from __future__ import annotations

import argparse

from labwatch import cli_demo

__all__ = ["add_commands", "dispatch"]

_COMMANDS: dict[str, object] = {}


def add_commands(sub: argparse._SubParsersAction) -> None:
    """Add the demo, record, replay, analyze, report and serve sub-commands."""
    cli_demo.add_demo(sub)
    _COMMANDS["demo"] = cli_demo.run_demo


def dispatch(args: argparse.Namespace) -> int:
    """Run the sub-command ``args.command``."""
    run = _COMMANDS.get(args.command)
    if run is None:
        raise ValueError(f"unknown command {args.command!r}")
    return run(args)  # type: ignore[operator]
