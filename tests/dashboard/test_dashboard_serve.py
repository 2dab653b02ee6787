"""`barrierflow serve`: the command of the CLI contract starts the dashboard (cli.md, 'serve')."""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_serve_refuses_a_bad_scenario_file_with_status_2(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('[scenario]\nduration = "-1 h"\n[[compartment]]\nid = "a"\nvolume = "1 mL"\n')
    done = subprocess.run([sys.executable, "-m", "barrierflow", "serve", str(bad), "--port", str(_free_port())],
                          capture_output=True, text=True, timeout=60)
    assert done.returncode == 2
    assert "bad.toml: scenario duration: got -1 h" in done.stderr
    assert "Traceback" not in done.stderr


def _start(*extra: str) -> tuple[subprocess.Popen, int, str, dict]:
    """Start `barrierflow serve` with the demo; wait for the layout; return it and its headers."""
    port = _free_port()
    state = tempfile.mkdtemp(prefix="barrierflow-serve-state-")  # the sessions of this server, not the user's
    env = dict(os.environ, BARRIERFLOW_STATE_DIR=state)
    proc = subprocess.Popen([sys.executable, "-m", "barrierflow", "serve", str(ROOT / "scenarios" / "daily_patch.toml"),
                             "--host", "127.0.0.1", "--port", str(port), "--no-prepare", *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, env=env)
    proc.state_dir = state
    layout, headers = None, {}
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{port}/_dash-layout", timeout=5) as r:
                layout, headers = r.read().decode(), dict(r.headers)
            break
        except OSError:
            time.sleep(0.3)
    if layout is None:
        out = proc.stdout.read() if proc.poll() is not None else "no answer"
        proc.terminate()
        proc.wait(timeout=20)
        raise AssertionError(out)
    return proc, port, layout, headers


def _stop(proc: subprocess.Popen) -> str:
    proc.terminate()
    out, _ = proc.communicate(timeout=20)
    shutil.rmtree(proc.state_dir, ignore_errors=True)
    return out


def test_serve_starts_the_dashboard_with_the_scenario_opened_on_waitress():
    proc, port, layout, headers = _start()
    try:
        assert "daily_patch.toml" in layout and "Research estimates" in layout
        assert headers.get("Server") == "barrierflow"  # waitress, with the server name set
        # the Host header is checked against the bound address (a DNS-rebinding guard)
        request = urllib.request.Request(f"http://127.0.0.1:{port}/_dash-layout",
                                         headers={"Host": f"rebound.example:{port}"})
        try:
            urllib.request.urlopen(request, timeout=10)
            status = 200
        except urllib.error.HTTPError as err:
            status, text = err.code, err.read().decode()
        assert status == 403 and f"Host header: got rebound.example:{port}" in text
    finally:
        out = _stop(proc)
    assert "development server" not in out.lower()
    assert f"Serving on http://127.0.0.1:{port}" in out


def test_serve_with_debug_keeps_the_development_server():
    proc, _port, layout, headers = _start("--debug")
    try:
        assert "Research estimates" in layout
        assert "Werkzeug" in headers.get("Server", "")
    finally:
        _stop(proc)
