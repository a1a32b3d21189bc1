"""``labwatch serve`` without a browser: page settings, read-only enforcement in the kernel."""

from __future__ import annotations

import json

import pytest

from labwatch.cli import main
from labwatch.cli_serve import SERVE_CONFIG_ENV, serve_command
from labwatch.serve_page import ReadOnlyDashboard, dashboard_from_env

CONFIG = {
    "endpoint": "tcp://127.0.0.1:5799",
    "control": None,
    "allow_control": False,
    "window_s": 12.0,
    "epoch_s": 0.5,
    "keys": None,
}


def test_read_only_page_refuses_control_and_recording_whatever_the_browser_sends():
    dash = dashboard_from_env({SERVE_CONFIG_ENV: json.dumps(CONFIG)})
    assert isinstance(dash, ReadOnlyDashboard)
    assert dash.engine.config.window_s == 12.0 and dash.engine.config.epoch_s == 0.5
    # what a browser could send: the widgets' values and the dashboard's synced traits
    dash.controls.record.value = True
    dash.controls.auto_stop.value = True
    dash.recording = True
    dash.auto_stop = True
    dash.control_endpoint = "tcp://127.0.0.1:5800"
    assert dash.recording is False and dash.auto_stop is False and dash.control_endpoint == ""
    assert dash.stop_source() is None  # no endpoint: nothing is sent
    c = dash.controls
    assert all(x.layout.display == "none" for x in (c.stop_source, c.record, c.auto_stop))


def test_allow_control_page_has_the_stop_endpoint():
    cfg = dict(CONFIG, allow_control=True, control="tcp://127.0.0.1:5800")
    dash = dashboard_from_env({SERVE_CONFIG_ENV: json.dumps(cfg)})
    assert not isinstance(dash, ReadOnlyDashboard)
    assert dash.control_endpoint == "tcp://127.0.0.1:5800"
    assert not dash.controls.stop_source.disabled


def test_page_without_configuration_says_how_to_start_it():
    with pytest.raises(ValueError, match="labwatch serve"):
        dashboard_from_env({})


def test_voila_listens_on_loopback_only():
    cmd = serve_command("nb.ipynb", 8123)
    assert "--Voila.ip=127.0.0.1" in cmd and "--port=8123" in cmd and "--no-browser" in cmd


@pytest.mark.parametrize(
    "argv, message",
    [
        (["--control", "tcp://127.0.0.1:5800"], "--allow-control"),
        (["--allow-control", "--server-public-key", "k", "--client-key", "c"], "not supported"),
        (["--client-key", "c"], "--server-public-key"),
        (["--port", "0"], "--port"),
    ],
)
def test_bad_serve_options_are_refused(argv, message, capsys):
    assert main(["serve", "tcp://127.0.0.1:5799", *argv]) == 2
    assert message in capsys.readouterr().err
