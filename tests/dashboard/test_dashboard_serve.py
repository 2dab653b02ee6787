"""`barrierflow serve`: the command of the CLI contract starts the dashboard (cli.md, 'serve')."""

from __future__ import annotations

import socket
import subprocess
import sys
import time
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


def test_serve_starts_the_dashboard_with_the_scenario_opened():
    port = _free_port()
    proc = subprocess.Popen([sys.executable, "-m", "barrierflow", "serve", str(ROOT / "scenarios" / "daily_patch.toml"),
                             "--host", "127.0.0.1", "--port", str(port)],
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    try:
        layout = None
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and proc.poll() is None:
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/_dash-layout", timeout=5) as r:
                    layout = r.read().decode()
                break
            except OSError:
                time.sleep(0.3)
        assert layout is not None, proc.stdout.read() if proc.poll() is not None else "no answer"
        assert "daily_patch.toml" in layout and "Research estimates" in layout
    finally:
        proc.terminate()
        proc.wait(timeout=20)
