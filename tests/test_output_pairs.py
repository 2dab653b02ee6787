"""The traces CSV and its sidecar: written as a pair that a reader can always check.

What is checked (issue 10, "Nothing lost, nothing mismatched"): the sidecar records the CSV's
SHA-256 (FIPS 180-4, Secure Hash Standard, 2015; computed by Python's hashlib); both files are
complete before either is renamed into place; a failed run leaves no file; temporary files of a
killed write are removed by the next write; and, in kill trials, a process killed at random
moments while writing never leaves a pair that claims to match but does not, nor a half file.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from pathlib import Path

import pytest

import barrierflow
from barrierflow.cli import main
from barrierflow.io import (
    atomic_write,
    atomic_write_together,
    remove_stale_temporaries,
    traces_digest,
    traces_match,
    write_traces,
)

ROOT = Path(__file__).resolve().parents[1]
CELL = ROOT / "scenarios" / "diffusion_cell.toml"


def test_sidecar_records_the_hash_of_the_csv_it_belongs_with(tmp_path):
    result = barrierflow.simulate(barrierflow.load(CELL))
    out = result.to_csv(tmp_path / "cell.csv")
    side = json.loads((tmp_path / "cell.json").read_text(encoding="utf-8"))
    raw = out.read_bytes()
    assert side["traces"] == {"sha256": hashlib.sha256(raw).hexdigest(), "bytes": len(raw)}
    assert traces_match(out)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cell.csv", "cell.json"]
    # the exported sidecar (the dashboard's) carries the same record
    assert json.loads(result.sidecar_text())["traces"] == side["traces"]


def test_a_csv_beside_a_sidecar_of_another_run_is_told_apart(tmp_path):
    write_traces(tmp_path / "a.csv", "time [h]\n0\n", _sidecar("time [h]\n0\n"))
    assert traces_match(tmp_path / "a.csv")
    (tmp_path / "a.csv").write_text("time [h]\n1\n", encoding="utf-8")  # a new CSV, the old sidecar
    assert not traces_match(tmp_path / "a.csv")
    (tmp_path / "a.json").write_text("{}", encoding="utf-8")  # a sidecar without the record
    assert not traces_match(tmp_path / "a.csv")
    (tmp_path / "a.json").unlink()
    assert not traces_match(tmp_path / "a.csv")


def test_a_failing_run_leaves_no_file(tmp_path, monkeypatch, capsys):
    # issue 10: a run whose metrics failed (an IndexError after a NaN) left a CSV with blank cells
    # and no sidecar. Everything is now made before the first file is written.
    from barrierflow.analysis import Result

    def broken(self, *a, **k):
        raise IndexError("index 0 is out of bounds for axis 0 with size 0")

    monkeypatch.setattr(Result, "metrics", broken)
    (tmp_path / "cell.csv").write_text("an older run\n", encoding="utf-8")
    code = main(["run", str(CELL), "-o", str(tmp_path / "cell.csv"), "--no-progress"])
    assert code == 1
    assert "internal error: IndexError" in capsys.readouterr().err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cell.csv"]
    assert (tmp_path / "cell.csv").read_text(encoding="utf-8") == "an older run\n"


def test_a_solver_failure_leaves_no_file(tmp_path, monkeypatch, capsys):
    import barrierflow.analysis
    from barrierflow import SolverError

    def failing(*a, **k):
        raise SolverError("the solution failed at t = 2 h: injected", time=2.0)

    monkeypatch.setattr(barrierflow.analysis, "simulate", failing)
    assert main(["run", str(CELL), "-o", str(tmp_path / "x.csv"), "--metrics", str(tmp_path / "m.csv")]) == 3
    assert list(tmp_path.iterdir()) == []


def test_nothing_is_renamed_until_every_file_is_complete(tmp_path, monkeypatch):
    (tmp_path / "a.csv").write_text("old csv", encoding="utf-8")
    (tmp_path / "a.json").write_text("old json", encoding="utf-8")
    real_fsync, calls = os.fsync, []

    def fail_on_second(fd):
        calls.append(fd)
        if len(calls) == 2:  # the sidecar's temporary file cannot be flushed
            raise OSError(28, "No space left on device")
        real_fsync(fd)

    monkeypatch.setattr(os, "fsync", fail_on_second)
    with pytest.raises(OSError, match="No space left") as info:
        atomic_write_together([(tmp_path / "a.csv", "new csv"), (tmp_path / "a.json", "new json")])
    assert info.value.filename == str(tmp_path / "a.json")
    assert (tmp_path / "a.csv").read_text(encoding="utf-8") == "old csv"
    assert (tmp_path / "a.json").read_text(encoding="utf-8") == "old json"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.csv", "a.json"]


def test_temporary_files_of_a_killed_write_are_removed_by_the_next(tmp_path):
    dead = _dead_pid()
    stale = [tmp_path / f".out.csv.{dead}-abc123.tmp", tmp_path / f".out.json.{dead}-x_y9.tmp"]
    live = tmp_path / f".out.csv.{os.getppid()}-live01.tmp"  # a write in progress in a live process
    old = tmp_path / f".out.csv.{os.getppid()}-old001.tmp"   # ... or a day old: its number was reused
    other = tmp_path / f".other.csv.{dead}-abc123.tmp"       # another file's: not ours to judge
    for p in [*stale, live, old, other]:
        p.write_text("partial", encoding="utf-8")
    day_ago = time.time() - 25 * 3600
    os.utime(old, (day_ago, day_ago))
    write_traces(tmp_path / "out.csv", "t\n", _sidecar("t\n"))
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(["out.csv", "out.json", live.name, other.name])
    assert remove_stale_temporaries(tmp_path / "other.csv") == [other]


def test_atomic_write_keeps_the_mode_of_the_file_it_replaces(tmp_path):
    target = tmp_path / "a.toml"
    target.write_text("x", encoding="utf-8")
    os.chmod(target, 0o640)
    atomic_write(target, "y")
    assert target.stat().st_mode & 0o777 == 0o640


def _sidecar(csv_text: str) -> str:
    return json.dumps({"traces": traces_digest(csv_text)})


def _dead_pid() -> int:
    """A process number that no process has now (a child that has ended)."""
    import subprocess
    import sys

    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid
