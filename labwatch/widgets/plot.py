"""A bqplot figure of series over source time, with lines, ±σ bands and horizontal guides.

Marks are created once and only their ``x``/``y`` are replaced on redraw, inside
``hold_sync()`` so that one redraw is one message per mark.  Points that are not finite are
left out (a band needs both edges).
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator

import bqplot as bq
import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = ["COLORS", "TimePlot", "finite_points", "hold_all"]

#: Colour-blind-safe palette (Okabe & Ito, "Color Universal Design", 2008).
COLORS = {
    "blue": "#0072B2",
    "orange": "#E69F00",
    "green": "#009E73",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
    "sky": "#56B4E9",
    "grey": "#666666",
    "black": "#000000",
}


@contextlib.contextmanager
def hold_all(*widgets) -> Iterator[None]:
    """``hold_sync()`` on several widgets at once."""
    with contextlib.ExitStack() as stack:
        for wdg in widgets:
            stack.enter_context(wdg.hold_sync())
        yield


def finite_points(x: ArrayLike, *ys: ArrayLike) -> tuple[NDArray[np.float64], ...]:
    """``x`` and each ``y`` restricted to the indices where all of them are finite."""
    xa = np.asarray(x, dtype=float)
    arrays = [np.asarray(y, dtype=float) for y in ys]
    ok = np.isfinite(xa)
    for a in arrays:
        ok &= np.isfinite(a)
    return (xa[ok], *(a[ok] for a in arrays))


class TimePlot:
    """A bqplot Figure with named marks over a shared time axis.

    Parameters
    ----------
    title : str
    y_label : str
    x_label : str
    height : str
        CSS height of the figure.
    y_min, y_max : float, optional
        Fixed ends of the y axis (None: follow the data).
    """

    def __init__(
        self,
        title: str,
        y_label: str,
        x_label: str = "source time since run start (s)",
        height: str = "280px",
        y_min: float | None = None,
        y_max: float | None = None,
    ) -> None:
        self.x_scale = bq.LinearScale()
        self.y_scale = bq.LinearScale(min=y_min, max=y_max)
        self.scales = {"x": self.x_scale, "y": self.y_scale}
        self.x_axis = bq.Axis(scale=self.x_scale, label=x_label, grid_lines="dashed")
        self.y_axis = bq.Axis(scale=self.y_scale, label=y_label, side="left", grid_lines="dashed")
        self.marks: dict[str, bq.Lines] = {}
        self._hlines: set[str] = set()
        self.figure = bq.Figure(
            title=title,
            marks=[],
            axes=[self.x_axis, self.y_axis],
            animation_duration=0,
            legend_location="top-left",
            fig_margin={"top": 40, "bottom": 45, "left": 60, "right": 15},
            layout={"height": height, "width": "100%"},
            title_style={"font-size": "18px"},
        )

    # ------------------------------------------------------------------ construction
    def _add(self, name: str, mark: bq.Lines) -> bq.Lines:
        if name in self.marks:
            raise ValueError(f"mark {name!r} exists already")
        self.marks[name] = mark
        self.figure.marks = [*self.figure.marks, mark]
        return mark

    def add_band(self, name: str, color: str, opacity: float = 0.25) -> bq.Lines:
        """A filled band between two curves (e.g. value ± σ)."""
        return self._add(
            name,
            bq.Lines(
                x=np.zeros(0),
                y=np.zeros((2, 0)),
                scales=self.scales,
                fill="between",
                colors=[color, color],
                fill_colors=[color],
                fill_opacities=[opacity],
                opacities=[0.0, 0.0],
                stroke_width=0.5,
            ),
        )

    def add_line(
        self,
        name: str,
        color: str,
        label: str,
        style: str = "solid",
        width: float = 2.5,
    ) -> bq.Lines:
        """A curve with a legend entry."""
        return self._add(
            name,
            bq.Lines(
                x=np.zeros(0),
                y=np.zeros(0),
                scales=self.scales,
                colors=[color],
                labels=[label],
                display_legend=True,
                line_style=style,
                stroke_width=width,
            ),
        )

    def add_hline(self, name: str, color: str, label: str, style: str = "dashed") -> bq.Lines:
        """A horizontal guide (a bound, a threshold) across the time range of the data."""
        mark = self.add_line(name, color, label, style=style, width=2.0)
        mark.visible = False
        self._hlines.add(name)
        return mark

    # ------------------------------------------------------------------ updates
    def hold(self):
        """Context manager: hold sync of every mark (one message per mark per redraw)."""
        return hold_all(*self.marks.values())

    def set_line(self, name: str, x: ArrayLike, y: ArrayLike) -> None:
        """Replace a curve's points (non-finite points left out)."""
        xs, ys = finite_points(x, y)
        mark = self.marks[name]
        mark.x, mark.y = xs, ys

    def set_band(self, name: str, x: ArrayLike, low: ArrayLike, high: ArrayLike) -> None:
        """Replace a band's edges (points where either edge is missing left out)."""
        xs, lo, hi = finite_points(x, low, high)
        mark = self.marks[name]
        mark.x, mark.y = xs, np.vstack([lo, hi])

    def set_hline(self, name: str, y: float | None, x_span: tuple[float, float]) -> None:
        """Show the guide at ``y`` over ``x_span``; hide it when ``y`` is None or not finite."""
        mark = self.marks[name]
        if y is None or not np.isfinite(y):
            mark.visible = False
            return
        x0, x1 = x_span
        if not x1 > x0:
            x1 = x0 + 1.0
        mark.x, mark.y = np.array([x0, x1], dtype=float), np.array([y, y], dtype=float)
        mark.visible = True

    def points(self, name: str) -> int:
        """Number of points a mark currently shows."""
        return int(np.asarray(self.marks[name].x).shape[-1])
