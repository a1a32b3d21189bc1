"""The ``labwatch`` command line: simulate, watch, record, replay, analyze, report, demo, serve.

Run ``labwatch COMMAND --help`` for each command's options.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from collections.abc import Sequence

from labwatch import __version__
from labwatch.cli_options import add_analysis_options, positive, unit
from labwatch.transport import DEFAULT_ENDPOINT, EndpointError

__all__ = ["main", "build_parser"]

SAFETY = (
    "Safety: labwatch only reads counts. It never replaces an interlock; follow your lab's "
    "laser and detector safety rules."
)


_positive = positive
_unit = unit


def _add_simulate(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "simulate", help="run a simulated entangled-pair source (binds a PUB socket)"
    )
    p.add_argument(
        "endpoint",
        nargs="?",
        default=DEFAULT_ENDPOINT,
        help=f"bind address (default {DEFAULT_ENDPOINT})",
    )
    p.add_argument(
        "--source",
        default="polarization",
        help="source model: polarization, qudit, local, adaptive-local (default polarization)",
    )
    p.add_argument(
        "--visibility",
        type=_unit,
        default=0.98,
        help="white-noise visibility V of the state (default 0.98)",
    )
    p.add_argument(
        "--misalignment",
        type=float,
        default=0.0,
        help="extra half-wave-plate rotation on Bob, degrees (polarization source)",
    )
    p.add_argument(
        "--rate",
        type=_positive,
        default=50000.0,
        help="emitted pairs per second (default 50000); detected coincidences are fewer by the efficiencies",
    )
    p.add_argument(
        "--efficiency",
        type=_unit,
        default=None,
        help="detector efficiency (keeps the no-click outcome when given with --no-click)",
    )
    p.add_argument(
        "--no-click",
        action="store_true",
        help="publish a no-click outcome per party (no fair-sampling assumption)",
    )
    p.add_argument("--dark-rate", type=float, default=0.0, help="dark counts per detector, Hz")
    p.add_argument("--dim", type=int, default=3, help="qudit dimension (qudit source, prime power)")
    p.add_argument(
        "--bases", type=int, default=2, help="measurement bases per party (qudit source)"
    )
    p.add_argument(
        "--frames",
        choices=("shared", "random"),
        default="shared",
        help="qudit stations share a reference frame, or random unknown frames",
    )
    p.add_argument(
        "--drift",
        action="store_true",
        help="simulate an operator aligning: misalignment decays over time",
    )
    p.add_argument(
        "--duration",
        type=_positive,
        default=None,
        help="stop after this many seconds of source time",
    )
    p.add_argument(
        "--speed", type=_positive, default=1.0, help="source seconds per wall second (default 1)"
    )
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument(
        "--settings",
        choices=("blocks", "random"),
        default="blocks",
        help="settings held in blocks (histograms) or random per trial (events)",
    )
    p.add_argument(
        "--interval", type=_positive, default=0.1, help="source seconds per message (default 0.1)"
    )
    p.add_argument(
        "--block",
        type=_positive,
        default=1.0,
        help="seconds each setting pair is held in blocks mode (default 1)",
    )
    p.add_argument(
        "--faults",
        default=None,
        help="inject faults, e.g. 'malformed=0.1,drop=0.02,duplicate=0.01,reorder=0.01' or 'garbage'",
    )
    p.add_argument(
        "--control",
        default=None,
        help="bind a control (stop) socket here, e.g. tcp://127.0.0.1:5781",
    )
    p.add_argument(
        "--sndhwm",
        type=int,
        default=100_000,
        help="send high-water mark: messages queued per monitor before drops (default 100000)",
    )
    p.add_argument("--source-id", default="sim", help="source id in the headers (default sim)")
    p.add_argument("--run-id", default=None, help="run id (default: made from seed and clock)")
    _add_security(p, server=True)


def _add_watch(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("watch", help="subscribe and print the live figures once per second")
    p.add_argument(
        "endpoint",
        nargs="?",
        default=DEFAULT_ENDPOINT,
        help=f"publisher endpoint (default {DEFAULT_ENDPOINT})",
    )
    p.add_argument(
        "--duration", type=_positive, default=math.inf, help="stop after this many wall seconds"
    )
    p.add_argument(
        "--json",
        action="store_true",
        help="print one JSON object with the final figures at the end (status lines go to stderr)",
    )
    add_analysis_options(p)
    p.add_argument(
        "--stop-source",
        action="store_true",
        help="send a stop command to the source when the target is met",
    )
    p.add_argument(
        "--control",
        default=None,
        help="the source's control endpoint (default: publisher port + 1)",
    )
    p.add_argument(
        "--record",
        default=None,
        help="record every received message to this new file; if recording fails mid-run "
        "(disk full) monitoring goes on, the error is shown and the exit code is 3",
    )
    p.add_argument(
        "--silence",
        type=_positive,
        default=3.0,
        help="show NO DATA when nothing arrived for this many wall seconds (default 3)",
    )
    p.add_argument("--quiet", action="store_true", help="no status lines")
    _add_security(p, server=False)


def _add_security(p: argparse.ArgumentParser, server: bool) -> None:
    if server:
        p.add_argument(
            "--server-key",
            default=None,
            help="CurveZMQ: this source's secret key file (enables encryption)",
        )
        p.add_argument(
            "--allowed-keys",
            default=None,
            help="CurveZMQ: directory of authorised client public keys",
        )
    else:
        p.add_argument(
            "--server-public-key",
            default=None,
            help="CurveZMQ: the source's public key file (pins it)",
        )
        p.add_argument(
            "--client-key", default=None, help="CurveZMQ: this monitor's secret key file"
        )


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``labwatch`` command."""
    parser = argparse.ArgumentParser(
        prog="labwatch", description="Live Bell-test monitor. " + SAFETY
    )
    parser.add_argument("--version", action="version", version=f"labwatch {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)
    _add_simulate(sub)
    _add_watch(sub)
    from labwatch import cli_more

    cli_more.add_commands(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``labwatch`` console script; returns the exit code."""
    args = build_parser().parse_args(argv)
    try:
        if args.command == "simulate":
            from labwatch.cli_simulate import run_simulate

            return run_simulate(args)
        if args.command == "watch":
            from labwatch.cli_watch import run_watch

            return run_watch(args)
        from labwatch import cli_more

        return cli_more.dispatch(args)
    except EndpointError as exc:
        print(f"labwatch: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
    except (ValueError, OSError) as exc:
        print(f"labwatch {args.command}: {exc}", file=sys.stderr)
        return 2


def _print_json(obj: object) -> None:
    print(json.dumps(obj, indent=None, separators=(",", ":"), allow_nan=False))


if __name__ == "__main__":
    sys.exit(main())
