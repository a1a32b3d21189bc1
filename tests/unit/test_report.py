"""The HTML report and report.json of a replayed recording (view layer, no sockets)."""

from __future__ import annotations

import json
import re
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

import pytest

from labwatch.analysis import AnalysisConfig
from labwatch.engine import EngineConfig, MonitorEngine
from labwatch.recording_summary import file_sha256, recording_dict
from labwatch.replay import demo_recording_path, replay_into
from labwatch.report import (
    REPORT_FORMAT,
    SAFETY_NOTE,
    ReportCollector,
    render_html,
    report_data,
    write_report,
)
from labwatch.summary import summary_dict

DEMO = demo_recording_path()
_VOID = {"meta", "br", "hr", "img", "input", "link", "col", "area", "base", "wbr", "source"}


class _Checker(HTMLParser):
    """Collects structural errors: unbalanced tags and external references."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.external: list[str] = []
        self.svg = 0

    def handle_starttag(self, tag, attrs):
        for name, value in attrs:
            if name in ("src", "href") and value and not value.startswith("#"):
                self.external.append(f"{tag} {name}={value}")
        if tag == "svg":
            self.svg += 1
        if tag not in _VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self.handle_starttag(tag, attrs)
        if tag not in _VOID:
            self.stack.pop()

    def handle_endtag(self, tag):
        if tag in _VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
            return
        self.stack.pop()


@pytest.fixture(scope="module")
def demo_report():
    engine = MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False)))
    collector = ReportCollector()
    engine.subscribe(collector)
    result = replay_into(engine, DEMO)
    sha = file_sha256(DEMO)
    prov = {
        "file": DEMO,
        "sha256": sha,
        "created_wall": result.header.created_wall,
        "metadata": result.header.metadata,
        "scenario": result.header.metadata["scenario"],
        "recording": recording_dict(result, sha),
    }
    data = report_data(collector, result.final, result.health, prov)
    return data, result, collector


def test_report_json_round_trips_and_holds_the_final_summary(demo_report, tmp_path):
    data, result, _ = demo_report
    files = write_report(tmp_path / "out", data)
    loaded = json.loads((tmp_path / "out" / "report.json").read_text(encoding="utf-8"))
    assert files.json.endswith("report.json") and files.html.endswith("report.html")
    assert loaded == data
    assert loaded["format"] == REPORT_FORMAT
    expected = summary_dict(result.final, result.health)
    expected["target_met"] = False
    assert loaded["final"] == json.loads(json.dumps(expected))
    assert loaded["provenance"]["sha256"] == file_sha256(DEMO)
    assert loaded["provenance"]["software"].startswith("labwatch ")
    rows = {r["name"]: r for r in loaded["final_figures"]}
    assert rows["bell"]["value"] == pytest.approx(result.final.bell.value, rel=0, abs=0)
    assert rows["bell"]["assumptions"] == list(result.final.bell.assumptions)


def test_html_is_well_formed_self_contained_and_shows_figures_and_digest(demo_report):
    data, result, _ = demo_report
    page = render_html(data)
    checker = _Checker()
    checker.feed(page)
    checker.close()
    assert checker.errors == [] and checker.stack == []
    assert checker.external == []  # no external scripts, styles or images
    assert "<script" not in page
    assert checker.svg >= 3  # Bell value, rates, timeline
    for svg in re.findall(r"<svg.*?</svg>", page, flags=re.S):
        ET.fromstring(svg)  # every inline figure is well-formed XML
    assert file_sha256(DEMO) in page
    assert SAFETY_NOTE in page
    # the final CHSH value at the precision of its error (2 significant digits of the error)
    assert f"{result.final.bell.value:.3f}" in page and "fixed n" in page
    assert "random per trial" in page
    assert "CHSH over the run" in page and "{'" not in page  # names, never a dict's repr


def test_timeline_shows_the_injected_faults(demo_report):
    data, result, _ = demo_report
    events = data["timeline"]["events"]
    rejected = [e for e in events if e["kind"] == "rejected"]
    assert sum(e["count"] for e in rejected) == result.health.rejected == 2
    assert {e["detail"] for e in rejected} == {"header_json x1", "duplicate x1"}
    assert sum(e["count"] for e in events if e["kind"] == "missing") == result.health.missing == 1
    # the generator drops seq 60, i.e. source time 12.0-12.2 s; receive times are source + 4 ms
    (gap,) = [e for e in events if e["kind"] == "missing"]
    assert 12.0 < gap["t"] < 14.5
    (run,) = data["timeline"]["runs"]
    assert run["trials"] == result.final.trials and run["settings_mode"] == "random"
    assert data["timeline"]["target_met_at"] is None


def test_series_are_per_run_and_bounded(demo_report):
    data, result, collector = demo_report
    (series,) = data["series"]
    assert series["points"] == collector.snapshots == result.snapshots
    assert series["bell"][-1] == pytest.approx(result.final.bell.value, abs=0)
    assert len(series["t"]) == len(series["bell"]) == len(series["bell_err"])
    small = ReportCollector(capacity=4)
    engine = MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False)))
    engine.subscribe(small)
    replay_into(engine, DEMO)
    (hist,) = small.histories.values()
    assert hist.points <= 5 and hist.stride > 1


def test_report_of_an_empty_stream_still_renders():
    engine = MonitorEngine()
    data = report_data(ReportCollector(), None, engine.health(), {"file": "nothing.lwrec"})
    page = render_html(data)
    assert "Final figures" in page and SAFETY_NOTE in page
    assert data["series"] == [] and data["final"]["coincidences"] == 0


def test_interval_figures_evidence_and_target_are_drawn_and_tabulated():
    from dataclasses import replace

    from labwatch.snapshot import Figure

    engine = MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False)))
    snaps = []
    engine.subscribe(snaps.append)
    result = replay_into(engine, DEMO)
    collector = ReportCollector()
    for k, s in enumerate(snaps):
        # figures as the analysis layer reports them (values made up for the view test)
        vis = Figure(
            "visibility",
            0.9 - 0.005 * k,
            0.01,
            0.88 - 0.005 * k,
            0.92 - 0.005 * k,
            0.95,
            ("i.i.d.", "fair sampling"),
        )
        p = Figure("p_value", 10.0 ** (-k), assumptions=("random settings", "stopping-safe"))
        target = {"description": "p<=1e-6", "met": k >= 6, "trials": s.trials}
        collector(replace(s, figures=(vis, p), extras={"target": target}))
    last = replace(snaps[-1], figures=(vis, p), extras={"target": target})
    data = report_data(collector, last, result.health, {"file": DEMO})
    page = render_html(data)
    assert page.count("<svg") == 5  # Bell value, visibility, evidence, rates, timeline
    rows = {r["name"]: r for r in data["final_figures"]}
    assert rows["visibility"]["low"] == pytest.approx(vis.low) and rows["target"]["value"] == "met"
    assert f"[{vis.low:.5g}, {vis.high:.5g}] at 95%" in page
    assert "stopping-safe" in page and "fair sampling" in page
    met = [e for e in data["timeline"]["events"] if e["kind"] == "target met"]
    assert len(met) == 1 and met[0]["detail"] == "p<=1e-6"
    assert data["timeline"]["target_met_at"] == pytest.approx(met[0]["t"])
    (series,) = data["series"]
    assert series["neg_log10_p"][-1] == pytest.approx(len(snaps) - 1)
    assert series["visibility_low"][0] == pytest.approx(0.88)
