"""``labwatch serve ENDPOINT``: a standalone dashboard page (Voilà) on 127.0.0.1.

Voilà runs the small dashboard notebook shipped in ``labwatch/data/`` (code hidden) and serves
it as a web page.  The page is **read-only** unless ``--allow-control``: no stop button, no
auto-stop and no recording to the server's disk; viewers can still change their own view
(functional, window, target, new run), which affects only their page.  The settings reach the
notebook's kernel as JSON in the ``LABWATCH_SERVE_CONFIG`` environment variable
(:func:`labwatch.serve_page.dashboard_from_env` reads it).
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import subprocess
import sys
from importlib import resources
from pathlib import Path
from typing import Any

from labwatch.transport import check_endpoint

__all__ = ["SERVE_NOTEBOOK", "SERVE_CONFIG_ENV", "add_serve", "run_serve", "serve_command"]

#: The dashboard notebook shipped with the package (package data).
SERVE_NOTEBOOK = "serve_dashboard.ipynb"

#: Environment variable carrying the page settings (JSON) to the notebook kernel.
SERVE_CONFIG_ENV = "LABWATCH_SERVE_CONFIG"


def add_serve(sub: argparse._SubParsersAction) -> None:
    """Register the ``serve`` sub-command."""
    p = sub.add_parser(
        "serve",
        help="serve a read-only dashboard web page of a stream (Voila, 127.0.0.1)",
        description="Serve the live dashboard of a stream as a web page on 127.0.0.1 "
        "(Voila). Read-only unless --allow-control. Open http://127.0.0.1:PORT/ in a browser.",
    )
    p.add_argument("endpoint", help="publisher endpoint, e.g. tcp://127.0.0.1:5780")
    p.add_argument("--port", type=int, default=8866, help="web page port (default 8866)")
    p.add_argument(
        "--allow-control",
        action="store_true",
        help="show the stop button and auto-stop, and allow recording on this machine",
    )
    p.add_argument(
        "--control",
        default=None,
        help="the source's control endpoint with --allow-control (default: publisher port + 1)",
    )
    p.add_argument("--window", type=float, default=30.0, help="rolling window, s (default 30)")
    p.add_argument("--epoch", type=float, default=1.0, help="analysis interval, s (default 1)")
    p.add_argument(
        "--server-public-key", default=None, help="CurveZMQ: the source's public key file"
    )
    p.add_argument("--client-key", default=None, help="CurveZMQ: this monitor's secret key file")


def _config_from_args(args: argparse.Namespace) -> dict[str, Any]:
    check_endpoint(args.endpoint)
    if not 1 <= args.port <= 65535:
        raise ValueError(f"--port {args.port} must be 1-65535")
    for name in ("window", "epoch"):
        if not getattr(args, name) > 0:
            raise ValueError(f"--{name} must be a positive number of seconds")
    control = None
    if args.allow_control:
        from labwatch.cli_watch import _control_default

        control = check_endpoint(args.control or _control_default(args.endpoint))
        if args.server_public_key:
            raise ValueError(
                "--allow-control with CurveZMQ keys is not supported by the dashboard's stop "
                "button yet; use `labwatch watch --stop-source` with keys"
            )
    elif args.control:
        raise ValueError("--control needs --allow-control (the page is read-only without it)")
    if bool(args.server_public_key) != bool(args.client_key):
        raise ValueError("CurveZMQ needs both --server-public-key and --client-key")
    keys = None
    if args.server_public_key:
        keys = [str(Path(args.server_public_key).resolve()), str(Path(args.client_key).resolve())]
    return {
        "endpoint": args.endpoint,
        "control": control,
        "allow_control": bool(args.allow_control),
        "window_s": float(args.window),
        "epoch_s": float(args.epoch),
        "keys": keys,
    }


def serve_command(notebook: str | os.PathLike[str], port: int) -> list[str]:
    """The Voilà command line serving ``notebook`` on 127.0.0.1:``port``."""
    return [
        sys.executable,
        "-m",
        "voila",
        str(notebook),
        f"--port={int(port)}",
        "--no-browser",
        "--Voila.ip=127.0.0.1",
        "--show_tracebacks=False",
        "--strip_sources=True",
    ]


def run_serve(args: argparse.Namespace) -> int:
    """Run Voilà until interrupted; returns its exit code."""
    config = _config_from_args(args)
    try:
        import voila  # noqa: F401
    except ImportError:
        print(
            "labwatch serve: Voila is not installed; install the 'browser' or 'test' extra "
            "(pip install -e '.[test]')",
            file=sys.stderr,
        )
        return 2
    env = dict(os.environ, **{SERVE_CONFIG_ENV: json.dumps(config)})
    with resources.as_file(resources.files("labwatch") / "data" / SERVE_NOTEBOOK) as nb:
        mode = "with stop control" if config["allow_control"] else "read-only"
        print(
            f"labwatch serve: dashboard of {config['endpoint']} ({mode}) on "
            f"http://127.0.0.1:{args.port}/",
            file=sys.stderr,
            flush=True,
        )
        proc = subprocess.Popen(serve_command(nb, args.port), env=env, cwd=nb.parent)

        def _terminate(signum: int, frame: object) -> None:  # stop Voila and its kernels
            if proc.poll() is None:
                proc.terminate()

        previous = signal.signal(signal.SIGTERM, _terminate)
        try:
            return proc.wait()
        except KeyboardInterrupt:
            proc.send_signal(signal.SIGINT)
            try:
                return proc.wait(10)
            except subprocess.TimeoutExpired:
                proc.kill()
                return proc.wait()
        finally:
            signal.signal(signal.SIGTERM, previous)
            if proc.poll() is None:
                proc.kill()
                proc.wait()
