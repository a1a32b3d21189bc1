"""`labwatch demo`: simulator + JupyterLab (or the console view) in one command, cleaned up."""

from __future__ import annotations

import signal
import time
import urllib.error
import urllib.request

import psutil
import pytest

from tests.conftest import free_port


def test_console_demo_runs_and_leaves_no_children(run_cli):
    p = run_cli("demo", "--console", "--duration", "4", "--port", str(free_port()))
    time.sleep(1.5)
    children = psutil.Process(p.pid).children(recursive=True)
    assert children, "the demo should have started the simulated source"
    out, err = p.communicate(timeout=60)
    assert p.returncode == 0, err
    assert "CHSH" in out and "interlock" in err  # figures, and the safety line
    gone, alive = psutil.wait_procs(children, timeout=10)
    assert not alive


def test_lab_demo_serves_jupyterlab_and_cleans_up_on_ctrl_c(run_cli):
    pytest.importorskip("jupyterlab", reason="the 'lab' extra is not installed")
    lab_port = free_port()
    p = run_cli("demo", "--port", str(free_port()), "--lab-port", str(lab_port))
    deadline = time.monotonic() + 60
    status = None
    while time.monotonic() < deadline and status is None:
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{lab_port}/lab", timeout=2) as r:
                status = r.status
        except urllib.error.HTTPError as exc:  # 403 without the token still proves it is up
            status = exc.code
        except (urllib.error.URLError, ConnectionError, TimeoutError):
            time.sleep(0.5)
        assert p.poll() is None, p.communicate()[1][-2000:]
    assert status is not None, "JupyterLab did not come up"
    children = psutil.Process(p.pid).children(recursive=True)
    assert len(children) >= 2  # simulator and JupyterLab
    p.send_signal(signal.SIGINT)
    p.communicate(timeout=60)
    gone, alive = psutil.wait_procs(children, timeout=15)
    assert not alive, [c.cmdline() for c in alive]
