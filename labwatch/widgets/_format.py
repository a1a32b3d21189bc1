"""Text formatting shared by the panels (plain functions; no widgets)."""

from __future__ import annotations

import html
import math
from collections.abc import Iterable

__all__ = [
    "DASH",
    "esc",
    "finite",
    "fmt",
    "fmt_pm",
    "fmt_rate",
    "fmt_count",
    "fmt_age",
    "fmt_percent",
    "fmt_p",
    "fmt_assumptions",
]

#: Shown wherever a figure is absent or not finite.
DASH = "—"


def esc(text: object) -> str:
    """HTML-escape ``str(text)``."""
    return html.escape(str(text), quote=True)


def finite(v: object) -> bool:
    """True for a real, finite number (bools excluded)."""
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def fmt(v: object, spec: str = ".3f") -> str:
    """``format(v, spec)``, or :data:`DASH` when ``v`` is missing or not finite."""
    if not finite(v):
        return DASH
    return format(float(v), spec)  # type: ignore[arg-type]


def _decimals(err: float, cap: int = 6) -> int:
    """Decimals that show ``err`` with two significant figures (common practice, no source)."""
    if not err > 0:
        return 3
    return int(min(max(1 - math.floor(math.log10(err)), 0), cap))


def fmt_pm(v: object, err: object, default_decimals: int = 3) -> str:
    """``"2.714 ± 0.012"``: the error to two significant figures, the value to match.

    Without a finite error the value alone is shown with ``default_decimals``.
    """
    if not finite(v):
        return DASH
    if not finite(err) or not float(err) > 0:  # type: ignore[arg-type]
        return format(float(v), f".{default_decimals}f")  # type: ignore[arg-type]
    d = _decimals(float(err))  # type: ignore[arg-type]
    return f"{float(v):.{d}f} ± {float(err):.{d}f}"  # type: ignore[arg-type]


def fmt_rate(hz: object) -> str:
    """A count rate: ``"312 /s"``, ``"3.12 k/s"``, ``"1.20 M/s"``."""
    if not finite(hz):
        return DASH
    x = float(hz)  # type: ignore[arg-type]
    if abs(x) >= 1e6:
        return f"{x / 1e6:.2f} M/s"
    if abs(x) >= 1e3:
        return f"{x / 1e3:.2f} k/s"
    if abs(x) >= 10:
        return f"{x:.0f} /s"
    return f"{x:.2f} /s"


def fmt_count(n: object) -> str:
    """An integer with thin-space thousands separators (``"1 234 567"``)."""
    if not isinstance(n, int) or isinstance(n, bool):
        return DASH
    return f"{n:,}".replace(",", "\u2009")


def fmt_age(seconds: object) -> str:
    """A duration for "last message ... ago": ``"0.4 s"``, ``"12 s"``, ``"3 min 05 s"``."""
    if not finite(seconds):
        return DASH
    s = max(float(seconds), 0.0)  # type: ignore[arg-type]
    if s < 10:
        return f"{s:.1f} s"
    if s < 120:
        return f"{s:.0f} s"
    if s < 7200:
        return f"{int(s // 60)} min {int(s % 60):02d} s"
    return f"{s / 3600:.1f} h"


def fmt_percent(frac: object, decimals: int = 1) -> str:
    """A fraction as a percentage (``0.253 -> "25.3 %"``)."""
    if not finite(frac):
        return DASH
    return f"{100 * float(frac):.{decimals}f} %"  # type: ignore[arg-type]


def fmt_p(p: object) -> str:
    """A p-value: ``"0.42"``, ``"3.1e-09"``; values below 1e-300 as ``"< 1e-300"``."""
    if not finite(p):
        return DASH
    x = float(p)  # type: ignore[arg-type]
    if x < 1e-300:
        return "< 1e-300"
    if x >= 0.001:
        return f"{x:.3g}"
    return f"{x:.1e}"


def fmt_assumptions(labels: Iterable[str] | None) -> str:
    """Assumption labels joined for display, e.g. ``"fixed n · Gaussian · i.i.d."``."""
    items = [str(a) for a in (labels or ()) if str(a)]
    return " · ".join(items) if items else "no assumption labels reported"
