"""Option types and option groups shared by several ``labwatch`` sub-commands."""

from __future__ import annotations

import argparse
import math

__all__ = ["positive", "unit", "nonnegative_int", "add_analysis_options"]


def positive(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not v > 0 or not math.isfinite(v):
        raise argparse.ArgumentTypeError(f"{text!r} must be a positive number")
    return v


def unit(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not 0.0 <= v <= 1.0:
        raise argparse.ArgumentTypeError(f"{text!r} must be between 0 and 1")
    return v


def nonnegative_int(text: str) -> int:
    """An integer >= 0 (argparse type)."""
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be 0 or more")
    return v


def add_analysis_options(p: argparse.ArgumentParser) -> None:
    """The analysis options of ``watch`` (same names, defaults and meaning)."""
    p.add_argument(
        "--window",
        type=positive,
        default=30.0,
        help="rolling window, seconds of source time (default 30)",
    )
    p.add_argument(
        "--epoch",
        type=positive,
        default=1.0,
        help="analysis interval, seconds of source time (default 1)",
    )
    p.add_argument(
        "--functional",
        default="auto",
        help="auto, chsh, cglmp, certificate, or a .npy file with a coefficient tensor",
    )
    p.add_argument("--no-lp", action="store_true", help="skip the local-polytope LP (visibility)")
    p.add_argument(
        "--bootstrap",
        type=nonnegative_int,
        default=0,
        help="bootstrap resamples for the visibility error (default 0: delta method)",
    )
    p.add_argument(
        "--target",
        default=None,
        help="confidence target, e.g. 'p<=1e-6', 'lcb>local@0.01', 'v<1@0.01'",
    )
