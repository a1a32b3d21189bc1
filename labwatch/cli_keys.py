"""``labwatch keys DIR NAME``: make a CurveZMQ key pair for a source or a monitor."""

from __future__ import annotations

import argparse
import re
import sys
from pathlib import Path

__all__ = ["add_keys", "run_keys"]

_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")


def add_keys(sub: argparse._SubParsersAction) -> None:
    """Register the ``keys`` sub-command."""
    p = sub.add_parser(
        "keys",
        help="generate a CurveZMQ key pair (NAME.key public, NAME.key_secret secret)",
        description="Generate a CurveZMQ key pair for a source or a monitor. Give the public "
        "NAME.key to the other side; keep NAME.key_secret on this machine only.",
    )
    p.add_argument("directory", help="directory to write the two key files into")
    p.add_argument("name", help="key name, e.g. the host or station (letters, digits, . _ -)")


def run_keys(args: argparse.Namespace) -> int:
    """Write ``NAME.key`` and ``NAME.key_secret`` (mode 0600); never overwrites keys."""
    if not _NAME.match(args.name):
        raise ValueError(
            f"key name {args.name!r}: use 1-64 letters, digits, '.', '_' or '-' "
            "(starting with a letter or digit)"
        )
    directory = Path(args.directory)
    for suffix in (".key", ".key_secret"):
        existing = directory / f"{args.name}{suffix}"
        if existing.exists():
            raise ValueError(
                f"{existing} exists; refusing to overwrite a key (choose another name)"
            )
    from labwatch.security import generate_keys

    public, secret = generate_keys(directory, args.name)
    print(f"public key: {public}", flush=True)
    print(f"secret key: {secret} (mode 0600; keep it on this machine)", flush=True)
    print(
        "A source publishes with --server-key NAME.key_secret --allowed-keys DIR-of-monitor-.key-files;"
        " a monitor connects with --server-public-key SOURCE.key --client-key NAME.key_secret.",
        file=sys.stderr,
    )
    return 0
