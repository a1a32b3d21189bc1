"""Shared fixtures: free loopback ports, a receive helper with a timeout, process cleanup."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def endpoint() -> str:
    """A fresh loopback endpoint."""
    return f"tcp://127.0.0.1:{free_port()}"


@pytest.fixture
def run_cli() -> Iterator:
    """Start ``python -m labwatch ARGS`` subprocesses; all are killed at teardown."""
    procs: list[subprocess.Popen] = []

    def start(*args: str, **kw) -> subprocess.Popen:
        env = dict(os.environ, PYTHONUNBUFFERED="1")
        p = subprocess.Popen(
            [sys.executable, "-m", "labwatch", *args],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
            env=env,
            cwd=ROOT,
            **kw,
        )
        procs.append(p)
        return p

    yield start
    for p in procs:
        if p.poll() is None:
            p.kill()
        p.wait(10)
