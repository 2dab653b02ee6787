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
    in_background,
    remove_stale_temporaries,
    stage,
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


def test_to_csv_writes_the_csv_text_and_a_failure_to_format_it_leaves_no_file(tmp_path, monkeypatch):
    # the bytes written are csv_text's, and a failure of the compiled formatting reaches the
    # caller before any file is written
    result = barrierflow.simulate(barrierflow.load(CELL))
    out = result.to_csv(tmp_path / "cell.csv")
    assert out.read_bytes() == result.csv_text().encode("utf-8") == result.csv_bytes()
    assert in_background(sum, [1, 2, 3]).result() == 6

    def broken(table):
        raise MemoryError("no room for the text")

    monkeypatch.setattr("barrierflow.analysis.result.csv_row_bytes", broken)
    fresh = barrierflow.simulate(barrierflow.load(CELL))
    with pytest.raises(MemoryError, match="no room"):
        fresh.to_csv(tmp_path / "other.csv")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cell.csv", "cell.json"]


def test_the_csv_flushed_in_another_thread_is_removed_when_the_sidecar_or_its_own_flush_fails(tmp_path, monkeypatch):
    # to_csv writes the CSV's temporary file and another thread waits for its flush while the
    # sidecar's content is computed: a failure of that content, or of the CSV's own flush, leaves
    # the folder as it was (no temporary file, the older pair untouched)
    from barrierflow.analysis import Result

    result = barrierflow.simulate(barrierflow.load(CELL))
    out = result.to_csv(tmp_path / "cell.csv")
    before = {p.name: p.read_bytes() for p in tmp_path.iterdir()}

    def broken(self):
        raise ValueError("the warnings failed")

    with monkeypatch.context() as m:
        m.setattr(Result, "warnings", broken)
        with pytest.raises(ValueError, match="warnings failed"):
            barrierflow.simulate(barrierflow.load(CELL)).to_csv(out)
    assert {p.name: p.read_bytes() for p in tmp_path.iterdir()} == before
    real_fsync = os.fsync

    def fail_for_the_csv(fd):
        if os.path.basename(os.readlink(f"/proc/self/fd/{fd}")).startswith(".cell.csv."):
            raise OSError(28, "No space left on device")
        real_fsync(fd)

    monkeypatch.setattr(os, "fsync", fail_for_the_csv)
    with pytest.raises(OSError, match="No space left") as info:
        barrierflow.simulate(barrierflow.load(CELL)).to_csv(out)
    assert info.value.filename == str(out)
    assert {p.name: p.read_bytes() for p in tmp_path.iterdir()} == before


def test_to_csv_flushes_both_files_before_renaming_them_and_the_folder_after(tmp_path, monkeypatch):
    # the write protocol of a traces pair (common practice for a durable replacement on POSIX:
    # the new content flushed with fsync before the rename, the folder flushed after it): both
    # temporaries flushed, the CSV's in another thread while the sidecar is made, then the CSV
    # renamed, then the sidecar, then one flush of the folder
    import threading

    out = tmp_path / "cell.csv"
    result = barrierflow.simulate(barrierflow.load(CELL))
    result.to_csv(out)  # an older pair to replace
    events: list[tuple[str, str, bool]] = []
    real_fsync, real_replace = os.fsync, os.replace
    caller = threading.get_ident()

    def fsync(fd):
        real_fsync(fd)
        events.append(("fsync", os.path.basename(os.readlink(f"/proc/self/fd/{fd}")),
                       threading.get_ident() == caller))

    def replace(src, dst):
        real_replace(src, dst)
        events.append(("replace", Path(dst).name, threading.get_ident() == caller))

    monkeypatch.setattr(os, "fsync", fsync)
    monkeypatch.setattr(os, "replace", replace)
    barrierflow.simulate(barrierflow.load(CELL)).to_csv(out)
    monkeypatch.undo()
    flushed = {name.split(".")[2]: in_caller for kind, name, in_caller in events[:2] if kind == "fsync"}
    assert flushed == {"csv": False, "json": True}  # .cell.csv.<pid>-<random>.tmp: in the other thread
    assert [(kind, name) for kind, name, _ in events[2:]] == [("replace", "cell.csv"), ("replace", "cell.json"),
                                                            ("fsync", tmp_path.name)]  # the folder, once
    assert traces_match(out)


def test_to_csv_stopped_between_its_renames_leaves_a_complete_csv_that_the_old_sidecar_disowns(tmp_path,
                                                                                           monkeypatch):
    # a failure at the sidecar's rename (as a kill between the two renames): the CSV in place is
    # the complete new one, the sidecar the old one, and traces_match tells they differ; no
    # temporary file stays, and the next write leaves a matching pair. A failure of the sidecar's
    # own flush (in the caller, while the CSV's flush runs in the other thread) changes nothing.
    out = tmp_path / "cell.csv"
    first = barrierflow.simulate(barrierflow.load(CELL))
    first.to_csv(out)
    old_side = (tmp_path / "cell.json").read_bytes()
    real_fsync, real_replace = os.fsync, os.replace

    def fail_for_the_sidecar_flush(fd):
        if os.path.basename(os.readlink(f"/proc/self/fd/{fd}")).startswith(".cell.json."):
            raise OSError(5, "Input/output error")
        real_fsync(fd)

    before = {p.name: p.read_bytes() for p in tmp_path.iterdir()}
    with monkeypatch.context() as m:
        m.setattr(os, "fsync", fail_for_the_sidecar_flush)
        with pytest.raises(OSError, match="Input/output error") as info:
            barrierflow.simulate(barrierflow.load(CELL)).to_csv(out)
    assert info.value.filename == str(tmp_path / "cell.json")
    assert {p.name: p.read_bytes() for p in tmp_path.iterdir()} == before

    def stop_at_the_sidecar(src, dst):
        if Path(dst).name == "cell.json":
            raise OSError(5, "Input/output error")
        real_replace(src, dst)

    second = barrierflow.simulate(barrierflow.load(ROOT / "scenarios" / "benchmark_patch.toml"))  # other traces
    with monkeypatch.context() as m:
        m.setattr(os, "replace", stop_at_the_sidecar)
        with pytest.raises(OSError, match="Input/output error"):
            second.to_csv(out)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cell.csv", "cell.json"]
    assert out.read_bytes() == second.csv_bytes()  # complete, the new run's
    assert (tmp_path / "cell.json").read_bytes() == old_side
    assert not traces_match(out)
    second.to_csv(out)
    assert traces_match(out) and sorted(p.name for p in tmp_path.iterdir()) == ["cell.csv", "cell.json"]


def test_a_staged_file_is_renamed_with_the_others_or_removed(tmp_path):
    staged = stage(tmp_path / "a.csv", lambda: (b"t\n1\n", "made"))
    assert staged.value() == "made"
    atomic_write_together([(tmp_path / "a.csv", staged), (tmp_path / "a.json", "{}")])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.csv", "a.json"]
    assert (tmp_path / "a.csv").read_bytes() == b"t\n1\n"
    stage(tmp_path / "a.csv", lambda: (b"t\n2\n", None)).discard()  # given up: its temporary file goes
    wrong = stage(tmp_path / "a.csv", lambda: (b"t\n3\n", None))
    with pytest.raises(ValueError, match="staged for"):  # staged for another destination
        atomic_write_together([(tmp_path / "b.csv", wrong)])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.csv", "a.json"]
    assert (tmp_path / "a.csv").read_bytes() == b"t\n1\n"


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
    real_fsync = os.fsync

    def fail_for_the_sidecar(fd):
        # the sidecar's temporary file cannot be flushed (the two files are flushed at the same
        # time, in two threads: told apart by name, not by the order of the calls)
        if os.path.basename(os.readlink(f"/proc/self/fd/{fd}")).startswith(".a.json."):
            raise OSError(28, "No space left on device")
        real_fsync(fd)

    monkeypatch.setattr(os, "fsync", fail_for_the_sidecar)
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


@pytest.mark.skipif(not Path("/proc/self/fd").is_dir(), reason="counts open descriptors through /proc")
def test_replaced_files_are_released_and_their_readers_keep_the_old_bytes(tmp_path):
    # the files being replaced are closed by a background thread: none may stay open, and a
    # reader that opened the old file before the write still reads the old bytes (POSIX rename)
    # (descriptors counted by what they point to: other tests of the same process may open or
    # close descriptors of their own meanwhile)
    csv = tmp_path / "out.csv"
    write_traces(csv, "a\n1\n", _sidecar("a\n1\n"))
    with open(csv, encoding="utf-8") as reader:
        for k in range(5):
            write_traces(csv, f"a\n{k + 2}\n", _sidecar(f"a\n{k + 2}\n"))
        assert reader.read() == "a\n1\n"
    deadline = time.monotonic() + 10.0
    while _open_in(tmp_path) and time.monotonic() < deadline:
        time.sleep(0.01)
    assert _open_in(tmp_path) == []
    assert csv.read_text(encoding="utf-8") == "a\n6\n" and traces_match(csv)


def test_a_sidecar_made_during_the_write_sees_the_csv_complete_and_a_failure_changes_nothing(tmp_path):
    csv = tmp_path / "out.csv"
    write_traces(csv, "a\n1\n", _sidecar("a\n1\n"))
    seen = []

    def sidecar():  # made while the new CSV's temporary file is flushed to disk
        seen.extend(p.read_text(encoding="utf-8") for p in tmp_path.glob(".out.csv.*.tmp"))
        return _sidecar("a\n2\n")

    write_traces(csv, "a\n2\n", sidecar)
    assert seen == ["a\n2\n"] and traces_match(csv) and csv.read_text(encoding="utf-8") == "a\n2\n"

    def failing():
        raise RuntimeError("the metrics failed")

    with pytest.raises(RuntimeError, match="metrics failed"):
        write_traces(csv, "a\n3\n", failing)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.csv", "out.json"]
    assert csv.read_text(encoding="utf-8") == "a\n2\n" and traces_match(csv)


def _open_in(folder) -> list[str]:
    """What this process's open descriptors point to inside ``folder`` (replaced files show as
    ``<path> (deleted)``)."""
    out = []
    for fd in os.listdir("/proc/self/fd"):
        try:
            target = os.readlink(f"/proc/self/fd/{fd}")
        except OSError:  # closed meanwhile
            continue
        if target.startswith(str(folder)):
            out.append(target)
    return sorted(out)


def _sidecar(csv_text: str) -> str:
    return json.dumps({"traces": traces_digest(csv_text)})


def _dead_pid() -> int:
    """A process number that no process has now (a child that has ended)."""
    import subprocess
    import sys

    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


# ----------------------------------------------------------------------------- kill trials
# A child process writes traces pairs in a loop (the library's write_traces, with the texts of real
# runs); the test kills it with SIGKILL at a random moment, then reads what is on disk. Half the
# trials slow each rename down by 5 ms (a slow file system), which makes a kill between the CSV's
# rename and the sidecar's likely; on a fast disk that window is a few microseconds wide.
CHILD = '''
import os, sys, time
from pathlib import Path
from barrierflow.io import write_traces
data, out, mode, start = Path(sys.argv[1]), Path(sys.argv[2]), sys.argv[3], int(sys.argv[4])
pairs = [((data / f"{i}.csv").read_text(encoding="utf-8"), (data / f"{i}.json").read_text(encoding="utf-8"))
         for i in range(int(sys.argv[5]))]
if mode == "slow":
    real = os.replace
    def replace(a, b):
        real(a, b)
        time.sleep(0.005)
    os.replace = replace
print("ready", flush=True)
i = start
while True:
    write_traces(out, *pairs[i % len(pairs)])
    i += 1
'''
PLAIN_TRIALS = 30
SLOW_TRIALS = 30
CLI_TRIALS = 3


def _pairs(folder: Path) -> list[tuple[str, str]]:
    """Traces and sidecars of three real runs of the diffusion cell (different output steps)."""
    import dataclasses

    base = barrierflow.load(CELL)
    out = []
    for i, step in enumerate((1.0, 0.25, 1 / 12)):
        result = barrierflow.simulate(dataclasses.replace(base, output_step=step))
        csv_text = result.csv_text()
        pair = (csv_text, result.sidecar_text(csv_text))
        (folder / f"{i}.csv").write_text(pair[0], encoding="utf-8")
        (folder / f"{i}.json").write_text(pair[1], encoding="utf-8")
        out.append(pair)
    return out


def _which(path: Path, texts: list[str]) -> str:
    """'absent', the index of the complete text the file holds, or 'torn'."""
    if not path.exists():
        return "absent"
    raw = path.read_bytes()
    for i, t in enumerate(texts):
        if raw == t.encode("utf-8"):
            return str(i)
    return "torn"


def _inspect(out: Path, pairs: list[tuple[str, str]], outcomes: dict[str, int]) -> None:
    """Check the files a killed writer left, count the outcome, then write again (the next run)."""
    csv_state = _which(out, [p[0] for p in pairs])
    side_state = _which(out.with_suffix(".json"), [p[1] for p in pairs])
    assert "torn" not in (csv_state, side_state), (csv_state, side_state)
    match = traces_match(out)
    if side_state != "absent":
        assert csv_state != "absent"  # the sidecar is renamed last: never alone
    if match:
        assert csv_state == side_state  # a pair that says it matches does
        outcome = "matching pair"
    elif csv_state == "absent":
        outcome = "no file yet"
    else:
        assert csv_state != side_state
        outcome = "CSV beside the previous sidecar, told apart by the hash" if side_state != "absent" \
            else "CSV without sidecar yet"
    outcomes[outcome] = outcomes.get(outcome, 0) + 1
    temporaries = [p for p in out.parent.iterdir() if p.name.startswith(".")]
    if temporaries:
        outcomes["temporary files left (removed by the next write)"] = (
            outcomes.get("temporary files left (removed by the next write)", 0) + 1)
    write_traces(out, *pairs[0])  # the next run
    assert traces_match(out)
    assert sorted(p.name for p in out.parent.iterdir()) == [out.name, out.with_suffix(".json").name]


def test_kill_trials_never_leave_a_torn_file_or_an_undetected_mismatch(tmp_path):
    import random
    import signal
    import subprocess
    import sys

    data = tmp_path / "data"
    data.mkdir()
    pairs = _pairs(data)
    assert len({traces_digest(p[0])["sha256"] for p in pairs}) == len(pairs)
    script = tmp_path / "writer.py"
    script.write_text(CHILD, encoding="utf-8")
    folder = tmp_path / "out"
    folder.mkdir()
    out = folder / "cell.csv"
    rng = random.Random(20261204)
    outcomes: dict[str, dict[str, int]] = {"plain": {}, "slow": {}}
    started = time.monotonic()
    for trial in range(PLAIN_TRIALS + SLOW_TRIALS):
        mode = "plain" if trial % 2 else "slow"
        child = subprocess.Popen([sys.executable, str(script), str(data), str(out), mode, str(trial % 3 + 1),
                                  str(len(pairs))], stdout=subprocess.PIPE, text=True)
        try:
            assert child.stdout.readline().strip() == "ready"
            time.sleep(rng.uniform(0.0, 0.06))
        finally:
            child.send_signal(signal.SIGKILL)
            child.wait(timeout=30)
            child.stdout.close()
        _inspect(out, pairs, outcomes[mode])
    elapsed = time.monotonic() - started
    print(f"kill trials in {elapsed:.1f} s: {outcomes}")
    assert sum(outcomes["plain"].values()) >= PLAIN_TRIALS and sum(outcomes["slow"].values()) >= SLOW_TRIALS


def test_a_killed_command_line_run_leaves_no_partial_output(tmp_path):
    # the real `barrierflow run`, killed at a random moment of its run: the folder then holds
    # nothing, or a complete pair that matches; whatever temporaries remain, the next run removes
    import random
    import signal
    import subprocess
    import sys

    rng = random.Random(4)
    out = tmp_path / "cell.csv"
    seen = []
    for _ in range(CLI_TRIALS):
        child = subprocess.Popen([sys.executable, "-m", "barrierflow", "run", str(CELL), "-o", str(out),
                                  "--no-progress"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        time.sleep(rng.uniform(0.3, 1.5))
        child.send_signal(signal.SIGKILL)
        child.wait(timeout=30)
        names = sorted(p.name for p in tmp_path.iterdir() if not p.name.startswith("."))
        assert names in ([], ["cell.csv", "cell.json"]), names
        if names:
            assert traces_match(out)
        seen.append(names)
    done = subprocess.run([sys.executable, "-m", "barrierflow", "run", str(CELL), "-o", str(out), "--no-progress"],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cell.csv", "cell.json"] and traces_match(out)
    print(f"killed command-line runs left: {seen}")
