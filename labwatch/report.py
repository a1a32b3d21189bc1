"""Self-contained HTML report and ``report.json`` of a run (view layer: reads snapshots only).

A :class:`ReportCollector` subscribes to an engine (``engine.subscribe(collector)``) during a
replay and keeps, per run segment, a bounded :class:`~labwatch.history.History` of the
figures plus a timeline of runs, rejections, gaps, restarts and the moment a target was met.
:func:`report_data` turns it, the final snapshot and a provenance dict into one JSON-able
dict; :func:`render_html` draws the page from that dict alone (figures as inline SVG made
with matplotlib's Agg canvas, no pyplot state), so ``report.html`` and ``report.json`` always
show the same numbers.  :func:`write_report` writes both.

Examples
--------
>>> from labwatch.engine import MonitorEngine
>>> import os, tempfile
>>> from labwatch.replay import demo_recording_path, replay_into
>>> demo = demo_recording_path()
>>> engine = MonitorEngine()
>>> collector = ReportCollector()
>>> engine.subscribe(collector)
>>> result = replay_into(engine, demo)
>>> data = report_data(collector, result.final, result.health, {"file": demo})
>>> files = write_report(tempfile.mkdtemp(), data)
>>> sorted(os.path.basename(p) for p in (files.html, files.json))
['report.html', 'report.json']
"""

from __future__ import annotations

import html
import io
import json
import math
import os
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from labwatch import __version__
from labwatch.history import History
from labwatch.snapshot import Snapshot, StreamHealth, to_jsonable
from labwatch.summary import health_dict, summary_dict

__all__ = [
    "REPORT_FORMAT",
    "REPORT_VERSION",
    "SAFETY_NOTE",
    "ReportCollector",
    "ReportFiles",
    "render_html",
    "report_data",
    "write_report",
]

#: ``"format"`` and ``"version"`` of ``report.json``.
REPORT_FORMAT = "labwatch.report"
REPORT_VERSION = 1
#: Printed in the footer of every report.
SAFETY_NOTE = (
    "labwatch only reads counts: it never replaces an interlock. "
    "Local laser and detector safety rules prevail."
)

#: Health counters whose increase between snapshots is a timeline event, and its label.
_EVENT_COUNTERS = (
    ("rejected", "rejected"),
    ("missing", "missing"),
    ("duplicates", "duplicate"),
    ("restarts", "restart"),
    ("clock_jumps", "clock jump"),
)


def _health_counts(h: StreamHealth) -> dict[str, Any]:
    out: dict[str, Any] = {name: getattr(h, name) for name, _ in _EVENT_COUNTERS}
    out["gaps"] = h.gaps
    out["reasons"] = dict(h.rejections_by_reason)
    return out


def _finite(v: float | None) -> float | None:
    return v if v is not None and math.isfinite(v) else None


class ReportCollector:
    """Snapshot subscriber that gathers what a report plots.

    Parameters
    ----------
    capacity : int
        Points kept per run segment (see :class:`~labwatch.history.History`; evenly
        decimated beyond that).
    max_runs : int
        Run segments with a stored history; later ones are listed in the timeline only.
    max_events : int
        Timeline events kept; further ones are counted in ``events_dropped``.
    """

    def __init__(self, capacity: int = 1000, max_runs: int = 50, max_events: int = 2000) -> None:
        self.capacity = capacity
        self.max_runs = max_runs
        self.max_events = max_events
        self.histories: dict[tuple, History] = {}
        self.runs: dict[tuple, dict[str, Any]] = {}
        self.events: list[dict[str, Any]] = []
        self.events_dropped = 0
        self.snapshots = 0
        self.first_wall: float | None = None
        self.target_met_at: float | None = None
        self._prev: dict[str, Any] | None = None
        self._last_wall: float | None = None

    def __call__(self, snapshot: Snapshot) -> None:
        """Take one snapshot (the signature of an engine subscriber)."""
        self.snapshots += 1
        s = snapshot
        wall = _finite(s.health.last_message_wall)
        if wall is None:  # no receive times (not a replay): fall back on the source clock
            wall = s.t_stop
        if self.first_wall is None:
            self.first_wall = wall
        self._last_wall = wall
        key = (s.source, s.run, s.run_index)
        seg = self.runs.get(key)
        if seg is None:
            if self.runs:
                previous = list(self.runs.values())[-1]
                if previous["run"] == s.run and previous["source"] == s.source:
                    # restarted by hand; a new run id shows up as a "restart" instead
                    self._event(wall, s.t_stop, "new run", 1, f"segment {s.run_index}")
            seg = self.runs[key] = {
                "source": s.source,
                "run": s.run,
                "run_index": s.run_index,
                "wall_first": wall,
                "t_source_first": s.t_start,
                "random_settings": s.random_settings,
            }
            if len(self.histories) < self.max_runs:
                self.histories[key] = History(self.capacity)
        seg.update(wall_last=wall, t_source_last=s.t_stop, trials=s.trials)
        history = self.histories.get(key)
        if history is not None:
            history.append(s)
        self._health_events(wall, s.t_stop, s.health)
        target = s.extras.get("target")
        if self.target_met_at is None and isinstance(target, Mapping) and target.get("met"):
            self.target_met_at = wall
            self._event(wall, s.t_stop, "target met", 1, str(target.get("description", "")))

    def _event(self, wall: float, t_source: float, kind: str, count: int, detail: str) -> None:
        if len(self.events) >= self.max_events:
            self.events_dropped += 1
            return
        self.events.append(
            {"wall": wall, "t_source": t_source, "kind": kind, "count": count, "detail": detail}
        )

    def _health_events(self, wall: float, t_source: float, health: StreamHealth) -> None:
        now = _health_counts(health)
        prev = self._prev
        if prev is None:
            prev = dict.fromkeys(now, 0)
            prev["reasons"] = {}
        for name, label in _EVENT_COUNTERS:
            delta = now[name] - prev[name]
            if delta <= 0:
                continue
            detail = ""
            if name == "rejected":
                reasons = {
                    r: n - prev["reasons"].get(r, 0)
                    for r, n in now["reasons"].items()
                    if n > prev["reasons"].get(r, 0)
                }
                detail = ", ".join(f"{r} x{n}" for r, n in sorted(reasons.items()))
            elif name == "missing":
                detail = f"{now['gaps'] - prev['gaps']} gap(s)"
            self._event(wall, t_source, label, int(delta), detail)
        self._prev = now

    def finish(self, health: StreamHealth) -> None:
        """Add the events between the last snapshot and the end of the stream."""
        wall = _finite(health.last_message_wall)
        if wall is None:
            wall = self._last_wall if self._last_wall is not None else 0.0
        self._health_events(wall, math.nan, health)


# ------------------------------------------------------------------------------ data


def _pick(d: Mapping[str, Any] | None, *keys: str) -> Any:
    for k in keys:
        if not isinstance(d, Mapping):
            return None
        d = d.get(k)
    return d


def _functional_name(final: Mapping[str, Any]) -> str:
    """Name of the Bell functional: the summary holds a name or a ``{"name": ...}`` dict."""
    f = final.get("functional")
    if isinstance(f, Mapping):
        f = f.get("name")
    return str(f) if f else "Bell value"


def _final_rows(final: dict[str, Any]) -> list[dict[str, Any]]:
    """Rows of the final-figures table from the summary dict."""
    rows: list[dict[str, Any]] = []

    def add(name: str, label: str, value: Any, stderr: Any = None, **kw: Any) -> None:
        if value is None:
            return
        row = {
            "name": name,
            "label": label,
            "value": value,
            "stderr": stderr,
            "low": kw.pop("low", None),
            "high": kw.pop("high", None),
            "confidence_level": kw.pop("confidence_level", None),
            "assumptions": list(kw.pop("assumptions", ()) or ()),
            "note": kw.pop("note", ""),
        }
        rows.append(row)

    functional = _functional_name(final)
    for key, label in (("bell", "run"), ("bell_window", "rolling window")):
        b = final.get(key)
        if isinstance(b, Mapping):
            note = ""
            if b.get("local_bound") is not None:
                note = f"local bound {b['local_bound']:g}"
                if b.get("margin_sigma") is not None:
                    note += f", {b['margin_sigma']:.1f} σ above it"
            add(
                key,
                f"{functional} ({label})",
                b.get("value"),
                b.get("stderr"),
                assumptions=b.get("assumptions"),
                note=note,
            )
    for name, f in (final.get("figures") or {}).items():
        if isinstance(f, Mapping):
            add(
                name,
                name,
                f.get("value"),
                f.get("stderr"),
                low=f.get("low"),
                high=f.get("high"),
                confidence_level=f.get("confidence_level"),
                assumptions=f.get("assumptions"),
                note=f.get("note") or "",
            )
    rates = final.get("rates") or {}
    add(
        "coincidence_hz",
        "coincidence rate (window), Hz",
        rates.get("coincidence_hz"),
        rates.get("coincidence_hz_stderr"),
        assumptions=("Poisson counting",),
        note="stderr √N / live time",
    )
    for key, label in (
        ("singles_a_hz", "singles rate A (window), Hz"),
        ("singles_b_hz", "singles rate B (window), Hz"),
        ("accidentals_hz", "accidental coincidences (estimate), Hz"),
        ("heralding_a", "heralding efficiency A"),
        ("heralding_b", "heralding efficiency B"),
    ):
        add(key, label, rates.get(key))
    add("coincidences", "coincidences in the run", final.get("coincidences"))
    target = final.get("target")
    if isinstance(target, Mapping):
        add(
            "target",
            f"target {target.get('description', '')}".strip(),
            "met" if target.get("met") else "not met",
            note=f"after {target['trials']} trials" if target.get("trials") else "",
        )
    return rows


def _series(collector: ReportCollector) -> list[dict[str, Any]]:
    out = []
    for key, hist in collector.histories.items():
        source, run, run_index = key
        entry: dict[str, Any] = {
            "source": source,
            "run": run,
            "run_index": run_index,
            "stride": hist.stride,
            "points": hist.points,
            "t": hist.time(),
        }
        for name in hist.names:
            values = hist.series(name)
            if np.isfinite(values).any():
                entry[name] = values
        out.append(to_jsonable(entry))
    return out


def _timeline(collector: ReportCollector, origin: float | None) -> dict[str, Any]:
    if origin is None or not math.isfinite(origin):
        origin = collector.first_wall if collector.first_wall is not None else 0.0
    runs = [
        {
            "source": seg["source"],
            "run": seg["run"],
            "run_index": seg["run_index"],
            "start": seg["wall_first"] - origin,
            "stop": seg["wall_last"] - origin,
            "source_time": [seg["t_source_first"], seg["t_source_last"]],
            "trials": seg["trials"],
            "settings_mode": "random" if seg["random_settings"] else "blocks",
        }
        for seg in collector.runs.values()
    ]
    events = [
        {
            "t": e["wall"] - origin,
            "t_source": e["t_source"],
            "kind": e["kind"],
            "count": e["count"],
            "detail": e["detail"],
        }
        for e in collector.events
    ]
    return to_jsonable(
        {
            "time_axis": "monitor clock (receive time), seconds since the recording started",
            "origin_wall": origin,
            "runs": runs,
            "events": events,
            "events_dropped": collector.events_dropped,
            "target_met_at": None
            if collector.target_met_at is None
            else collector.target_met_at - origin,
        }
    )


def report_data(
    collector: ReportCollector,
    final: Snapshot | None,
    health: StreamHealth,
    provenance: Mapping[str, Any],
    title: str | None = None,
) -> dict[str, Any]:
    """Everything a report shows, as one JSON-able dict (the content of ``report.json``).

    Parameters
    ----------
    collector : ReportCollector
        Subscribed to the engine for the whole replay.
    final : Snapshot or None
        The engine's final snapshot (after its flush).
    health : StreamHealth
        The engine's health at the end.
    provenance : mapping
        Facts about the data: ``file``, ``sha256``, ``metadata``, ``created_wall`` (the time
        origin of the timeline), ``recording`` (see
        :func:`labwatch.recording_summary.recording_dict`), ``analysis`` options, ...
        Shown as given; ``software`` and ``generated_at`` are added.
    title : str, optional
        Page title (default: from the file name).

    Returns
    -------
    dict
        Keys ``format``, ``version``, ``title``, ``provenance``, ``final`` (the ``watch
        --json`` summary), ``final_figures`` (table rows with intervals and assumption
        labels), ``series`` (per run segment: source seconds since the run began, ``t``,
        and each figure's values), ``timeline``, ``health``, ``safety``.
    """
    collector.finish(health)
    final_summary = summary_dict(final, health)
    target = final_summary.get("target")
    final_summary["target_met"] = bool(isinstance(target, Mapping) and target.get("met"))
    prov = dict(provenance)
    prov.setdefault("software", f"labwatch {__version__}")
    prov.setdefault("generated_at", time.strftime("%Y-%m-%dT%H:%M:%S%z"))
    name = os.path.basename(str(prov.get("file", ""))) or "stream"
    return to_jsonable(
        {
            "format": REPORT_FORMAT,
            "version": REPORT_VERSION,
            "title": title or f"labwatch report: {name}",
            "provenance": prov,
            "final": final_summary,
            "final_figures": _final_rows(final_summary),
            "series": _series(collector),
            "timeline": _timeline(collector, _finite(prov.get("created_wall"))),
            "health": health_dict(health),
            "safety": SAFETY_NOTE,
        }
    )


# ------------------------------------------------------------------------------ plots

_COLORS = ("#1f5fa8", "#c2571a", "#2e8b57", "#8a3ea8", "#a83e4f", "#5a6b7a")


def _arr(values: Sequence[Any] | None) -> np.ndarray:
    if values is None:
        return np.array([], dtype=float)
    return np.array([np.nan if v is None else v for v in values], dtype=float)


def _svg(fig: Any, salt: str) -> str:
    import matplotlib

    buf = io.StringIO()
    with matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": salt}):
        fig.savefig(buf, format="svg", metadata={"Date": None}, bbox_inches="tight")
    text = buf.getvalue()
    return text[text.index("<svg") :]  # drop the XML prolog and DOCTYPE for inline use


def _new_figure(height: float = 3.0) -> tuple[Any, Any]:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.6, height), dpi=100)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    ax.grid(True, color="#dddddd", linewidth=0.6)
    ax.set_axisbelow(True)
    return fig, ax


def _label(entry: Mapping[str, Any], many: bool) -> str:
    return f"run {entry['run']} #{entry['run_index']}" if many else f"run {entry['run']}"


def _plot_band(
    series: list[dict[str, Any]], name: str, lo_hi: tuple[str, str] | str | None, ax: Any
) -> bool:
    drawn = False
    many = len(series) > 1
    for i, entry in enumerate(series):
        if name not in entry:
            continue
        c = _COLORS[i % len(_COLORS)]
        t, y = _arr(entry["t"]), _arr(entry[name])
        ax.plot(t, y, color=c, linewidth=1.4, label=_label(entry, many))
        if isinstance(lo_hi, str) and lo_hi in entry:
            err = _arr(entry[lo_hi])
            ax.fill_between(t, y - err, y + err, color=c, alpha=0.22, linewidth=0)
        elif isinstance(lo_hi, tuple) and lo_hi[0] in entry and lo_hi[1] in entry:
            ax.fill_between(
                t, _arr(entry[lo_hi[0]]), _arr(entry[lo_hi[1]]), color=c, alpha=0.22, linewidth=0
            )
        drawn = True
    return drawn


def _assumptions(labels: Sequence[str] | None) -> str:
    return "; ".join(str(a).rstrip(".") for a in labels) if labels else "none stated"


def _plots(data: Mapping[str, Any]) -> list[tuple[str, str, str]]:
    """``(title, inline svg, caption)`` for each plot the data supports."""
    series = data.get("series") or []
    final = data.get("final") or {}
    figures = final.get("figures") or {}
    out: list[tuple[str, str, str]] = []
    xlabel = "source time since the run began (s)"

    bell = final.get("bell") or {}
    fig, ax = _new_figure()
    if _plot_band(series, "bell", "bell_err", ax):
        many = len(series) > 1
        for i, entry in enumerate(series):
            if "bell_window" in entry:
                ax.plot(
                    _arr(entry["t"]),
                    _arr(entry["bell_window"]),
                    color=_COLORS[i % len(_COLORS)],
                    linewidth=0.8,
                    linestyle="--",
                    label=f"{_label(entry, many)}, rolling window",
                )
            if "bell_lcb" in entry:
                ax.plot(
                    _arr(entry["t"]),
                    _arr(entry["bell_lcb"]),
                    color=_COLORS[i % len(_COLORS)],
                    linewidth=0.9,
                    linestyle=":",
                    label=f"{_label(entry, many)}, stopping-safe lower bound",
                )
        if bell.get("local_bound") is not None:
            ax.axhline(bell["local_bound"], color="#444444", linewidth=1.0, linestyle="-.")
            ax.annotate(
                f"local bound {bell['local_bound']:g}",
                (0.01, bell["local_bound"]),
                xycoords=("axes fraction", "data"),
                textcoords="offset points",
                xytext=(0, 3),
                fontsize=8,
                color="#444444",
            )
        functional = _functional_name(final)
        ax.set_xlabel(xlabel)
        ax.set_ylabel(functional)
        ax.legend(fontsize=7, loc="lower right")
        out.append(
            (
                f"{functional} over the run",
                _svg(fig, "bell"),
                "Cumulative value of the run; band ±1σ (delta method). Assumptions: "
                f"{_assumptions(bell.get('assumptions'))}. Dashed: rolling window.",
            )
        )

    vis = figures.get("visibility") or {}
    fig, ax = _new_figure()
    if _plot_band(series, "visibility", ("visibility_low", "visibility_high"), ax):
        ax.axhline(1.0, color="#444444", linewidth=1.0, linestyle="-.")
        ax.annotate(
            "local points: v* ≥ 1",
            (0.01, 1.0),
            xycoords=("axes fraction", "data"),
            textcoords="offset points",
            xytext=(0, 3),
            fontsize=8,
            color="#444444",
        )
        ax.set_xlabel(xlabel)
        ax.set_ylabel("white-noise visibility v*")
        ax.legend(fontsize=7, loc="upper right")
        cl = vis.get("confidence_level")
        band = f"{cl:.0%} interval" if cl else "interval or ±1σ"
        out.append(
            (
                "Visibility (local-polytope LP)",
                _svg(fig, "visibility"),
                f"Band: {band}. Assumptions: {_assumptions(vis.get('assumptions'))}.",
            )
        )

    pv = figures.get("p_value") or {}
    fig, ax = _new_figure()
    if _plot_band(series, "neg_log10_p", None, ax):
        ax.set_xlabel(xlabel)
        ax.set_ylabel("−log10 p")
        ax.legend(fontsize=7, loc="upper left")
        out.append(
            (
                "Evidence against local realism",
                _svg(fig, "evidence"),
                f"−log10 of the p-value. Assumptions: {_assumptions(pv.get('assumptions'))}.",
            )
        )

    fig, ax = _new_figure()
    if _plot_band(series, "coincidence_hz", "coincidence_hz_err", ax):
        singles = False
        for i, entry in enumerate(series):
            for name, style in (("singles_a_hz", ":"), ("singles_b_hz", "-.")):
                if name in entry:
                    singles = True
                    ax.plot(
                        _arr(entry["t"]),
                        _arr(entry[name]),
                        color=_COLORS[i % len(_COLORS)],
                        linewidth=0.9,
                        linestyle=style,
                        label=name.replace("_hz", "").replace("_", " "),
                    )
        low = np.nanmin(
            [np.nanmin(_arr(e["coincidence_hz"])) for e in series if "coincidence_hz" in e]
        )
        high = max(
            float(np.nanmax(_arr(e[n])))
            for e in series
            for n in ("coincidence_hz", "singles_a_hz", "singles_b_hz")
            if n in e
        )
        if singles and low > 0 and high / low > 30:
            ax.set_yscale("log")
        ax.set_xlabel(xlabel)
        ax.set_ylabel("rate (Hz, rolling window)")
        ax.legend(fontsize=7, loc="lower right")
        out.append(
            (
                "Rates",
                _svg(fig, "rates"),
                "Coincidences per second over the rolling window; band ±1σ (Poisson counting)."
                + (" Dotted/dash-dotted: singles." if singles else ""),
            )
        )

    timeline = _timeline_plot(data.get("timeline") or {})
    if timeline is not None:
        out.append(timeline)
    return out


_EVENT_STYLE = {
    "rejected": ("x", "#b22222"),
    "missing": ("v", "#d2691e"),
    "duplicate": ("d", "#8b4513"),
    "restart": ("|", "#333333"),
    "clock jump": ("4", "#555555"),
    "new run": ("|", "#1f5fa8"),
    "target met": ("*", "#2e8b57"),
}


def _timeline_plot(tl: Mapping[str, Any]) -> tuple[str, str, str] | None:
    runs = tl.get("runs") or []
    if not runs:
        return None
    fig, ax = _new_figure(height=2.4)
    ax.grid(True, axis="x", color="#dddddd", linewidth=0.6)
    ax.grid(False, axis="y")
    for i, r in enumerate(runs):
        ax.broken_barh(
            [(r["start"], max(r["stop"] - r["start"], 1e-3))],
            (2.6, 0.8),
            facecolors=_COLORS[i % len(_COLORS)],
            alpha=0.7,
        )
        ax.text(r["start"], 3.5, f"run {r['run']}", fontsize=7, va="bottom")
    kinds = sorted({e["kind"] for e in tl.get("events") or []})
    rows = {k: 2.0 - 0.5 * j for j, k in enumerate(kinds)}
    for kind in kinds:
        evs = [e for e in tl["events"] if e["kind"] == kind]
        marker, color = _EVENT_STYLE.get(kind, ("o", "#666666"))
        total = sum(e["count"] for e in evs)
        ax.scatter(
            [e["t"] for e in evs],
            [rows[kind]] * len(evs),
            marker=marker,
            color=color,
            s=[min(20 + 10 * e["count"], 120) for e in evs],
            label=f"{kind} ({total})",
        )
    ax.set_yticks([3.0] + [rows[k] for k in kinds], ["runs"] + kinds, fontsize=8)
    ax.set_ylim(min([1.5] + [rows[k] - 0.5 for k in kinds]), 4.2)
    ax.set_xlabel("monitor clock: seconds since the recording started")
    if kinds:
        ax.legend(fontsize=7, loc="upper right", ncol=min(len(kinds), 4))
    return (
        "Timeline",
        _svg(fig, "timeline"),
        "Run segments and stream events on the receive clock; a marker stands for the events "
        "counted since the previous analysis epoch (its size grows with the count).",
    )


# ------------------------------------------------------------------------------ html

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:0 auto;max-width:60em;
padding:1em 1.5em;color:#222;line-height:1.4}
h1{font-size:1.5em;margin-bottom:.2em}h2{font-size:1.2em;border-bottom:1px solid #ccc;
margin-top:1.6em}table{border-collapse:collapse;margin:.5em 0;font-size:.92em}
td,th{border:1px solid #ccc;padding:.25em .6em;text-align:left;vertical-align:top}
th{background:#f2f2f2}td.num{text-align:right;font-variant-numeric:tabular-nums}
.tag{display:inline-block;background:#eef;border:1px solid #ccd;border-radius:3px;
padding:0 .3em;margin:0 .15em .1em 0;font-size:.85em}figure{margin:1em 0}
figcaption{font-size:.88em;color:#444}code,pre{font-size:.85em}
pre{background:#f7f7f7;padding:.6em;overflow-x:auto}.warn{color:#a00}
footer{margin-top:2em;border-top:1px solid #ccc;padding-top:.6em;font-size:.9em}
.safety{font-weight:bold}
"""


def _e(v: Any) -> str:
    return html.escape(str(v), quote=True)


def _pm(value: Any, stderr: Any) -> tuple[str, str]:
    """Value and ± formatted to the precision of the error."""
    if value is None:
        return "—", ""
    if isinstance(value, str):
        return value, ""
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        return f"{value:d}", "" if stderr is None else f"{stderr:.2g}"
    v = float(value)
    if stderr is None or not math.isfinite(stderr) or stderr <= 0:
        return f"{v:.6g}", ""
    decimals = max(0, 1 - math.floor(math.log10(stderr)))
    if decimals > 8:
        return f"{v:.4g}", f"{stderr:.2g}"
    return f"{v:.{decimals}f}", f"{stderr:.{decimals}f}"


def _num(v: Any, fmt: str = ".6g") -> str:
    if v is None:
        return "—"
    if isinstance(v, (int, np.integer)) and not isinstance(v, bool):
        return str(v)
    return format(float(v), fmt)


def _table(head: Sequence[str], rows: Sequence[Sequence[str]], num_cols: Sequence[int] = ()) -> str:
    out = ["<table><thead><tr>"]
    out += [f"<th>{_e(h)}</th>" for h in head]
    out.append("</tr></thead><tbody>")
    for row in rows:
        out.append("<tr>")
        for i, cell in enumerate(row):
            cls = ' class="num"' if i in num_cols else ""
            out.append(f"<td{cls}>{cell}</td>")
        out.append("</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _figures_section(data: Mapping[str, Any]) -> str:
    rows = []
    for r in data.get("final_figures") or []:
        value, err = _pm(r["value"], r["stderr"])
        interval = ""
        if r["low"] is not None or r["high"] is not None:
            cl = r["confidence_level"]
            interval = f"[{_num(r['low'], '.5g')}, {_num(r['high'], '.5g')}]"
            if cl:
                interval += f" at {cl:.0%}"
        tags = "".join(f'<span class="tag">{_e(a)}</span>' for a in r["assumptions"])
        rows.append([_e(r["label"]), _e(value), _e(err), _e(interval), tags or "—", _e(r["note"])])
    parts = [
        "<h2>Final figures</h2>",
        _table(
            ["figure", "value", "± 1σ", "interval", "assumptions", "note"], rows, num_cols=(1, 2)
        ),
    ]
    final = data.get("final") or {}
    corr = final.get("correlators")
    if isinstance(corr, Mapping) and corr.get("value") is not None:
        crow = []
        for x, (vals, errs) in enumerate(zip(corr["value"], corr["stderr"])):
            cells = []
            for v, e in zip(vals, errs):
                a, b = _pm(v, e)
                cells.append(_e(f"{a} ± {b}" if b else a))
            crow.append([f"x = {x}", *cells])
        ny = len(corr["value"][0]) if corr["value"] else 0
        parts.append("<p>Correlators E<sub>xy</sub> of the run (outcome 0 = +1):</p>")
        parts.append(
            _table(["", *[f"y = {y}" for y in range(ny)]], crow, num_cols=range(1, ny + 1))
        )
    contrast = final.get("contrast")
    if contrast:
        ny = len(contrast[0])
        parts.append("<p>Correlation contrast per setting pair:</p>")
        parts.append(
            _table(
                ["", *[f"y = {y}" for y in range(ny)]],
                [[f"x = {x}", *[_num(v, ".4f") for v in row]] for x, row in enumerate(contrast)],
                num_cols=range(1, ny + 1),
            )
        )
    mode = final.get("settings_mode")
    if mode == "blocks":
        parts.append(
            '<p class="warn">Settings were held in blocks: the figures are estimates under an '
            "i.i.d. assumption and cannot test local realism.</p>"
        )
    elif mode == "random":
        parts.append("<p>Settings were drawn at random per trial.</p>")
    return "".join(parts)


def _timeline_section(data: Mapping[str, Any]) -> str:
    tl = data.get("timeline") or {}
    runs = tl.get("runs") or []
    rows = [
        [
            _e(r["run"]),
            _e(r["run_index"]),
            _e(r["source"]),
            _num(r["start"], ".2f"),
            _num(r["stop"], ".2f"),
            _num(r["trials"]),
            _e(r["settings_mode"]),
        ]
        for r in runs
    ]
    parts = [
        "<h2>Timeline</h2>",
        f"<p>Time axis: {_e(tl.get('time_axis', ''))}.</p>",
        _table(
            ["run", "segment", "source", "from (s)", "to (s)", "coincidences", "settings"],
            rows,
            num_cols=(1, 3, 4, 5),
        ),
    ]
    if tl.get("target_met_at") is not None:
        parts.append(f"<p>Target met at {tl['target_met_at']:.2f} s.</p>")
    else:
        parts.append("<p>Target met: no.</p>")
    events = tl.get("events") or []
    if events:
        shown = events[:200]
        parts.append(
            _table(
                ["t (s)", "event", "count", "detail"],
                [
                    [_num(e["t"], ".2f"), _e(e["kind"]), _num(e["count"]), _e(e["detail"])]
                    for e in shown
                ],
                num_cols=(0, 2),
            )
        )
        more = len(events) - len(shown) + int(tl.get("events_dropped") or 0)
        if more:
            parts.append(f"<p>… and {more} more events (see report.json).</p>")
    else:
        parts.append("<p>No rejections, gaps or restarts.</p>")
    return "".join(parts)


def _health_section(data: Mapping[str, Any]) -> str:
    h = data.get("health") or {}
    keys = (
        "messages",
        "accepted",
        "rejected",
        "gaps",
        "missing",
        "missed_at_start",
        "late",
        "duplicates",
        "restarts",
        "clock_jumps",
        "heartbeats",
        "source_state",
    )
    rows = [[_e(k.replace("_", " ")), _e(h.get(k))] for k in keys if k in h]
    parts = ["<h2>Stream health</h2>", _table(["counter", "value"], rows, num_cols=(1,))]
    reasons = h.get("rejections_by_reason") or {}
    if reasons:
        parts.append(
            _table(
                ["rejection reason", "messages"],
                [[_e(r), _e(n)] for r, n in sorted(reasons.items())],
                num_cols=(1,),
            )
        )
    return "".join(parts)


def _provenance_section(data: Mapping[str, Any]) -> str:
    p = data.get("provenance") or {}
    rec = p.get("recording") or {}
    tail = rec.get("tail") or {}
    rows = []
    for label, value in (
        ("file", p.get("file")),
        ("size (bytes)", p.get("file_bytes")),
        ("SHA-256", p.get("sha256")),
        ("report made by", p.get("software")),
        ("recorded by", _pick(p, "metadata", "software")),
        ("recording started", p.get("created")),
        ("scenario", p.get("scenario")),
        ("records", rec.get("records")),
        (
            "messages (accepted / rejected)",
            None if not rec else f"{rec.get('accepted_records')} / {rec.get('rejected_records')}",
        ),
        (
            "annotations (new runs)",
            None if not rec else f"{rec.get('annotations')} ({rec.get('new_runs')})",
        ),
        ("replay verdicts that differ from the live ones", rec.get("verdict_changes")),
        (
            "end of file",
            None
            if not tail
            else f"{tail.get('status')}: {tail.get('reason')} ({tail.get('bytes_lost')} bytes lost)",
        ),
        ("damaged regions", None if not rec else len(rec.get("damaged") or [])),
        ("generated", p.get("generated_at")),
    ):
        if value is not None:
            cell = f"<code>{_e(value)}</code>" if label == "SHA-256" else _e(value)
            rows.append([_e(label), cell])
    parts = ["<h2>Provenance</h2>", _table(["", ""], rows)]
    if p.get("analysis"):
        parts.append("<p>Analysis options:</p>")
        parts.append(f"<pre>{_e(json.dumps(p['analysis'], indent=1, ensure_ascii=False))}</pre>")
    if p.get("metadata"):
        parts.append("<p>Recording metadata (file header):</p>")
        parts.append(f"<pre>{_e(json.dumps(p['metadata'], indent=1, ensure_ascii=False))}</pre>")
    return "".join(parts)


def render_html(data: Mapping[str, Any]) -> str:
    """The self-contained HTML page for a :func:`report_data` dict (no external resources)."""
    final = data.get("final") or {}
    title = str(data.get("title") or "labwatch report")
    prov = data.get("provenance") or {}
    summary = []
    if prov.get("scenario"):
        summary.append(f"<p>{_e(prov['scenario'])}</p>")
    bell = final.get("bell") or {}
    if bell.get("value") is not None:
        value, err = _pm(bell["value"], bell.get("stderr"))
        summary.append(
            f"<p><b>{_e(_functional_name(final))} = {_e(value)} ± {_e(err)}</b> "
            f"after {_e(final.get('coincidences'))} coincidences "
            f"({_e(_assumptions(bell.get('assumptions')))}).</p>"
        )
    plots = []
    for name, svg, caption in _plots(data):
        plots.append(
            f"<figure><figcaption><b>{_e(name)}.</b> {_e(caption)}</figcaption>{svg}</figure>"
        )
    body = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8"/>',
        '<meta name="viewport" content="width=device-width, initial-scale=1"/>',
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{_e(title)}</h1>",
        *summary,
        _figures_section(data),
        "<h2>Figures over time</h2>" if plots else "",
        *plots,
        _timeline_section(data),
        _health_section(data),
        _provenance_section(data),
        f'<footer><p class="safety">Safety: {_e(data.get("safety", SAFETY_NOTE))}</p>',
        f"<p>{_e(prov.get('software', ''))}; SHA-256 of the data: "
        f"<code>{_e(prov.get('sha256', 'n/a'))}</code></p></footer>",
        "</body></html>",
    ]
    return "\n".join(body)


@dataclass(frozen=True)
class ReportFiles:
    """Paths written by :func:`write_report`."""

    html: str
    json: str


def write_report(out_dir: str | os.PathLike[str], data: Mapping[str, Any]) -> ReportFiles:
    """Write ``report.html`` and ``report.json`` into ``out_dir`` (created if needed)."""
    os.makedirs(out_dir, exist_ok=True)
    html_path = os.path.join(out_dir, "report.html")
    json_path = os.path.join(out_dir, "report.json")
    page = render_html(data)
    with open(json_path, "w", encoding="utf-8") as fh:
        json.dump(data, fh, indent=1, allow_nan=False, ensure_ascii=False)
        fh.write("\n")
    with open(html_path, "w", encoding="utf-8") as fh:
        fh.write(page)
    return ReportFiles(html=html_path, json=json_path)
