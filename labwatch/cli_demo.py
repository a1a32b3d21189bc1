"""``labwatch demo``: a simulated source plus JupyterLab (or the console view), cleaned up on exit."""

from __future__ import annotations

import argparse
import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from importlib import resources
from pathlib import Path

from labwatch.cli_serve import SERVE_CONFIG_ENV, SERVE_NOTEBOOK

__all__ = ["add_demo", "run_demo"]


def add_demo(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "demo", help="start the simulated source and JupyterLab on the demo notebook"
    )
    p.add_argument(
        "--console",
        action="store_true",
        help="terminal view instead of JupyterLab (headless machines)",
    )
    p.add_argument(
        "--port", type=int, default=5780, help="simulator port on 127.0.0.1 (default 5780)"
    )
    p.add_argument(
        "--duration", type=float, default=None, help="stop after this many seconds (console view)"
    )
    p.add_argument(
        "--lab-port", type=int, default=8888, help="JupyterLab port on 127.0.0.1 (default 8888)"
    )


def _stop(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(5)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def run_demo(args: argparse.Namespace) -> int:
    """Run the demo; child processes are stopped on exit and on Ctrl-C."""
    endpoint = f"tcp://127.0.0.1:{args.port}"
    control = f"tcp://127.0.0.1:{args.port + 1}"
    sim_cmd = [
        sys.executable,
        "-m",
        "labwatch",
        "simulate",
        endpoint,
        "--control",
        control,
        "--drift",
        "--settings",
        "random",
        "--seed",
        "7",
    ]
    print("labwatch demo: simulated polarization-entangled source (no hardware).", file=sys.stderr)
    print(
        "Real benches: follow your lab's laser and detector safety rules; labwatch never replaces an interlock.",
        file=sys.stderr,
    )
    children: list[subprocess.Popen] = []
    try:
        children.append(subprocess.Popen(sim_cmd))
        time.sleep(0.5)
        if args.console:
            from labwatch.cli import main

            watch = ["watch", endpoint]
            if args.duration:
                watch += ["--duration", str(args.duration)]
            return main(watch)
        if (
            shutil.which("jupyter") is None
            and not (Path(sys.executable).parent / "jupyter").exists()
        ):
            print(
                "labwatch demo: JupyterLab is not installed; install the 'lab' extra (pip install -e '.[lab]') or use --console",
                file=sys.stderr,
            )
            return 2
        jupyter = (
            str(Path(sys.executable).parent / "jupyter")
            if (Path(sys.executable).parent / "jupyter").exists()
            else "jupyter"
        )
        # The dashboard notebook of `labwatch serve`, copied to a scratch folder and pointed at
        # the simulator through the environment the Jupyter server hands to its kernels.
        workdir = Path(tempfile.mkdtemp(prefix="labwatch-demo-"))
        nb = workdir / "labwatch_demo.ipynb"
        with resources.as_file(resources.files("labwatch") / "data" / SERVE_NOTEBOOK) as src:
            shutil.copyfile(src, nb)
        config = {
            "endpoint": endpoint,
            "control": control,
            "allow_control": True,
            "window_s": 30.0,
            "epoch_s": 1.0,
            "keys": None,
        }
        env = dict(os.environ, **{SERVE_CONFIG_ENV: json.dumps(config)})
        print(
            f"labwatch demo: JupyterLab on http://127.0.0.1:{args.lab_port}/ ({nb})",
            file=sys.stderr,
        )
        lab = subprocess.Popen(
            [
                jupyter,
                "lab",
                nb.name,
                "--ServerApp.ip=127.0.0.1",
                f"--ServerApp.port={args.lab_port}",
                *(["--allow-root"] if hasattr(os, "geteuid") and os.geteuid() == 0 else []),
            ],
            cwd=workdir,
            env=env,
        )
        children.append(lab)
        while all(c.poll() is None for c in children):
            time.sleep(0.5)
        return 0
    except KeyboardInterrupt:
        return 0
    finally:
        for c in reversed(children):
            _stop(c)
