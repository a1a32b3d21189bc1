"""The one place that talks to HiGHS: silent model creation and status-checked solves.

Every solve in :mod:`labwatch.polytope` goes through :func:`solve_checked`, which raises
:class:`SolverError` unless HiGHS reports success *and* the model status is one the caller
declared acceptable.
"""

from __future__ import annotations

import os
import sys

import highspy
import numpy as np
from numpy.typing import NDArray

__all__ = ["INF", "SolverError", "new_model", "solve_checked", "status_name"]

#: HiGHS' infinity, used for free bounds.
INF: float = highspy.kHighsInf


class SolverError(RuntimeError):
    """HiGHS failed, or finished with a model status the caller cannot use."""


_banner_shown = False


def _construct() -> highspy.Highs:
    # HiGHS prints a copyright banner from C on the first construction in a process, before
    # any option can be set; it would corrupt machine-readable stdout (``watch --json``).
    global _banner_shown
    if _banner_shown:
        return highspy.Highs()
    _banner_shown = True
    fd = 1  # the C library writes to file descriptor 1, whatever sys.stdout is
    try:
        os.fstat(fd)
        sys.stdout.flush()
    except (OSError, ValueError, AttributeError):
        return highspy.Highs()
    saved = os.dup(fd)
    try:
        with open(os.devnull, "w") as null:
            os.dup2(null.fileno(), fd)
            try:
                return highspy.Highs()
            finally:
                os.dup2(saved, fd)
    finally:
        os.close(saved)


def new_model() -> highspy.Highs:
    """A HiGHS instance with logging silenced (``output_flag`` and console log off)."""
    h = _construct()
    h.setOptionValue("output_flag", False)
    h.setOptionValue("log_to_console", False)
    return h


def status_name(h: highspy.Highs) -> str:
    """Model status as HiGHS spells it (e.g. ``"Optimal"``, ``"Infeasible"``)."""
    return str(h.modelStatusToString(h.getModelStatus()))


def solve_checked(h: highspy.Highs, what: str, accept: tuple[str, ...] = ("Optimal",)) -> str:
    """Run HiGHS and check both the call status and the model status.

    Parameters
    ----------
    h : highspy.Highs
        The model to solve (warm-started from its current basis, if any).
    what : str
        Short description used in error messages.
    accept : tuple of str
        Model statuses the caller can interpret.

    Returns
    -------
    str
        The model status.

    Raises
    ------
    SolverError
        When ``run`` returns an error or the model status is not in ``accept``.
    """
    run_status = h.run()
    if run_status == highspy.HighsStatus.kError:
        raise SolverError(f"HiGHS returned an error while solving the {what}")
    status = status_name(h)
    if status not in accept:
        raise SolverError(
            f"HiGHS finished the {what} with status {status!r}; expected one of {accept}"
        )
    return status


def as_index(values: NDArray[np.integer] | list[int]) -> NDArray[np.int32]:
    """HiGHS index arrays are 32-bit."""
    return np.ascontiguousarray(values, dtype=np.int32)
