"""`barrierflow prepare`: every compiled kernel is ready before the first run, so no run compiles.

These are checks of the project's own set-up step (common practice: compile ahead of use and keep
the compiled code in numba's on-disk cache, numba's documentation "Cache notes"); the numbers
they produce are not checked here, only that nothing is left to compile.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from barrierflow.cli import main
from barrierflow.studies import prepare as prep

ROOT = Path(__file__).resolve().parents[1]


def _cache_files() -> dict[str, tuple[int, int]]:
    """Every file of numba's cache for barrierflow's kernels: (modification time, size)."""
    folders = {Path(d._cache._cache_path) for d in prep._dispatchers().values() if hasattr(d._cache, "_cache_path")}
    out = {}
    for folder in folders:
        for f in folder.glob("*.nb[ic]"):
            st = f.stat()
            out[str(f)] = (st.st_mtime_ns, st.st_size)
    return out


@pytest.mark.slow
def test_prepare_reaches_every_compiled_function(capsys):
    assert main(["prepare"]) == 0
    said = capsys.readouterr().out
    assert "compiling the numerical kernels once" in said
    assert "ready:" in said and "note:" not in said
    kernels = prep.compiled_functions()
    assert len(kernels) >= 30
    # the functions left cold are exactly those no path calls today (each with its reason)
    assert {name for name, ready in kernels.items() if not ready} == set(prep.NOT_REACHED)
    assert prep.kernels_ready()
    # asked again when all is ready: nothing to do, and it says so
    assert main(["prepare", "--if-needed"]) == 0
    assert "every numerical kernel is compiled" in capsys.readouterr().out


@pytest.mark.slow
def test_after_prepare_what_users_do_compiles_nothing(tmp_path):
    # a new process runs every shipped scenario on the default path and writes its traces, a
    # population study of the demo and the dashboard's first run; numba's cache is not written to
    prep.prepare()
    before = _cache_files()
    assert before
    script = f"""
import glob
import barrierflow as bf
for path in sorted(glob.glob({str(ROOT / "scenarios" / "*.toml")!r})):
    result = bf.simulate(bf.load(path))
    result.to_csv({str(tmp_path)!r} + "/" + path.rsplit("/", 1)[1] + ".csv")
demo = bf.load({str(ROOT / "scenarios" / "daily_patch.toml")!r})
bf.run_population(demo, 20, seed=1, vary=["barrier.skin.layer.1.diffusivity=lognormal:cv=0.3"])
bf.simulate_population(demo, {{"compartment.central.clearance": 0.3}}, 10, seed=1)
from dashboard.runs import warm_up
warm_up()
"""
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=600,
                          env=dict(os.environ))
    assert done.returncode == 0, done.stderr
    after = _cache_files()
    changed = sorted(set(after) - set(before)) + sorted(f for f in before if after.get(f) != before[f])
    assert not changed, f"compiled after `barrierflow prepare`: {changed}"


@pytest.mark.slow
def test_no_kernel_is_compiled_for_a_literal_argument():
    # numba compiles a kernel again for each new combination of argument types, and a constant
    # handed to a compiled callee (0, True) is typed as a literal of its own: the callee is then
    # compiled twice, once for the literal and once for the plain type the other calls give
    # (seconds each for a run loop). After prepare, no cached signature holds a literal.
    prep.prepare()
    literal = {}
    for name, dispatcher in prep._dispatchers().items():
        if name in prep.NOT_REACHED:
            continue
        for key in dispatcher._cache._cache_file._load_index():
            found = [str(t) for t in key[0] if "Literal" in str(t)]
            if found:
                literal[name] = found
    assert not literal, f"compiled for a literal argument: {literal}"


def test_a_cache_prepared_from_other_sources_is_not_ready(monkeypatch):
    # numba checks a cached function against its own file only: a kernel that inlines a changed
    # kernel of another file would load stale, so a changed source makes the cache not ready
    assert len(prep.sources_fingerprint()) == 64
    assert prep.sources_fingerprint() == prep.sources_fingerprint()
    monkeypatch.setattr(prep, "sources_fingerprint", lambda: "0" * 64)
    assert not prep.kernels_ready()
