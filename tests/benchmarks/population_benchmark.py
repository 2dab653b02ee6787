"""Benchmark of the studies: populations, their memory, and a Sobol analysis (prints figures).

    .venv/bin/python tests/benchmarks/population_benchmark.py [--quick] [--big N]

Goals (issue "variability, sweeps and sensitivity"), on the demo patch (scenarios/daily_patch.toml,
a week at 5-minute output, 2017 rows, 19 traces):

- 1,000 subjects in <= 2 s (warm: the kernels compiled);
- 100,000 subjects in bounded memory (< 500 MB peak resident set);
- Sobol with 8 parameters and N = 1024 base samples (10,240 runs) in under a minute.

The baseline measured in the same run is the engine alone on the same subjects
(``barrierflow.simulate_population``: draws, builds and runs the subjects, no traces kept
beyond its arrays, no metrics, no bands); the study's time is shown as a ratio to it, which is
what a change to the studies layer moves. The machine is shared: absolute times vary with its
load (printed), ratios much less. Memory is measured in new processes (peak resident set of
each, resource.getrusage), against a process that runs one subject only (the peak resident set, VmHWM, of each child).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
SCENARIO = ROOT / "scenarios" / "daily_patch.toml"
VARY = ("barrier.skin.layer.1.diffusivity=lognormal:cv=0.3", "barrier.skin.layer.1.partition=lognormal:cv=0.3",
        "compartment.central.clearance=lognormal:cv=0.3", "compartment.central.volume=lognormal:cv=0.2")
SOBOL_VARY = VARY + ("barrier.skin.layer.1.thickness=lognormal:cv=0.2",
                     "barrier.skin.layer.2.diffusivity=lognormal:cv=0.3",
                     "compartment.peripheral.volume=lognormal:cv=0.2", "exchange.distribution.flow=lognormal:cv=0.3")

CHILD = """
import json, resource, sys, time
import barrierflow as bf
from barrierflow.studies import run_population
n, out = int(sys.argv[1]), sys.argv[2]
vary = json.loads(sys.argv[3])
s = bf.load(sys.argv[4])
t = time.perf_counter()
r = run_population(s, n, seed=1, vary=vary, subjects_csv=out)
wall = time.perf_counter() - t
try:  # the peak of this process's own memory (ru_maxrss would keep the forking parent's peak)
    with open("/proc/self/status") as fh:
        peak = next(int(line.split()[1]) for line in fh if line.startswith("VmHWM:")) / 1024
except OSError:
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(json.dumps({"n": n, "wall_s": wall, "failed": r.n_failed, "chunk": r.chunk, "maxrss_mb": peak}))
"""


def load_average() -> str:
    try:
        return " ".join(f"{x:.1f}" for x in os.getloadavg())
    except OSError:
        return "?"


def population_speed(n: int, rounds: int) -> dict:
    import barrierflow as bf
    from barrierflow.studies import run_population

    s = bf.load(SCENARIO)
    cv = {v.split("=")[0]: 0.3 for v in VARY}
    run_population(s, 8, seed=1, vary=VARY)            # warm-up: compile
    bf.simulate_population(s, cv, 8, seed=1)
    study, engine = [], []
    for _ in range(rounds):                             # interleaved rounds
        t = time.perf_counter()
        bf.simulate_population(s, cv, n, seed=1)
        engine.append(time.perf_counter() - t)
        t = time.perf_counter()
        r = run_population(s, n, seed=1, vary=VARY)
        study.append(time.perf_counter() - t)
    return {"n": n, "study_best_s": min(study), "study_median_s": statistics.median(study),
            "engine_best_s": min(engine), "engine_median_s": statistics.median(engine),
            "ratio": statistics.median([a / b for a, b in zip(study, engine, strict=True)]),
            "failed": r.n_failed, "chunk": r.chunk}


def breakdown(n: int) -> dict:
    """Time per subject of each stage of a chunk (one chunk of n)."""
    import barrierflow as bf
    from barrierflow.analysis.population import population_columns, population_metrics
    from barrierflow.analysis.sketch import count_values
    from barrierflow.studies.distributions import Variability, bare, with_variability
    from barrierflow.studies.runner import simulate_subjects

    full = with_variability(bf.load(SCENARIO), VARY)
    var = Variability.from_scenario(full)
    base = bare(full)
    t0 = time.perf_counter()
    values = var.draw(1, 1, n)
    t1 = time.perf_counter()
    pop, scen, _ = simulate_subjects(base, var.params, values)
    t2 = time.perf_counter()
    cols = population_columns(pop, scen[0])
    t3 = time.perf_counter()
    for _, block in cols[1:]:
        count_values(block)
    t4 = time.perf_counter()
    population_metrics(pop, scen)
    t5 = time.perf_counter()
    per = 1e3 / n
    return {"draw_ms": (t1 - t0) * per, "engine_ms": (t2 - t1) * per, "columns_ms": (t3 - t2) * per,
            "sketch_ms": (t4 - t3) * per, "metrics_ms": (t5 - t4) * per}


def memory(sizes: list[int]) -> list[dict]:
    out = []
    with tempfile.TemporaryDirectory() as tmp:
        for n in sizes:
            proc = subprocess.run([sys.executable, "-c", CHILD, str(n), str(Path(tmp) / f"s{n}.csv"),
                                   json.dumps(list(VARY)), str(SCENARIO)], capture_output=True, text=True, check=True)
            out.append(json.loads(proc.stdout.strip().splitlines()[-1]))
            print(f"  {n:>7,} subjects: peak RSS {out[-1]['maxrss_mb']:.0f} MB, {out[-1]['wall_s']:.1f} s "
                  f"({out[-1]['failed']} failed, chunks of {out[-1]['chunk']})", flush=True)
    return out


def sobol(n: int) -> dict:
    import barrierflow as bf
    from barrierflow.studies import sobol_indices

    s = bf.load(SCENARIO)
    sobol_indices(s, 2, vary=SOBOL_VARY, resamples=10)  # warm-up
    t = time.perf_counter()
    res = sobol_indices(s, n, vary=SOBOL_VARY, seed=1)
    wall = time.perf_counter() - t
    top = res.ranking("auc:central")[:3]
    return {"n": n, "params": len(res.params), "runs": res.runs, "wall_s": wall, "failed": res.failed,
            "top_auc_central": top}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="fewer rounds, 20,000 subjects for the memory")
    ap.add_argument("--big", type=int, default=None, help="subjects of the memory run (default 100,000)")
    args = ap.parse_args()
    import numba

    print(f"{platform.processor() or platform.machine()}, {os.cpu_count()} cores, numba threads "
          f"{numba.get_num_threads()}, Python {platform.python_version()}, numpy {np.__version__}")
    print(f"load average at start: {load_average()}")
    rounds = 2 if args.quick else 3
    p = population_speed(1000, rounds)
    print(f"population of 1,000 (demo patch, {len(VARY)} parameters): best {p['study_best_s']:.2f} s, median "
          f"{p['study_median_s']:.2f} s (goal <= 2 s); engine alone best {p['engine_best_s']:.2f} s; "
          f"study / engine {p['ratio']:.2f} (chunks of {p['chunk']}, {p['failed']} failed)")
    b = breakdown(200)
    print("per subject: " + ", ".join(f"{k[:-3]} {v:.3f} ms" for k, v in b.items()))
    big = args.big or (20_000 if args.quick else 100_000)
    print(f"memory (new processes; load average {load_average()}):")
    mem = memory([1, 10_000, big])
    print(f"  peak RSS grows by {mem[-1]['maxrss_mb'] - mem[1]['maxrss_mb']:+.0f} MB from 10,000 to {big:,} "
          f"subjects; above a one-subject process: {mem[-1]['maxrss_mb'] - mem[0]['maxrss_mb']:.0f} MB "
          f"(goal: < 500 MB peak)")
    so = sobol(1024)
    print(f"Sobol, {so['params']} parameters, N = {so['n']} ({so['runs']:,} runs): {so['wall_s']:.1f} s "
          f"(goal < 60 s), {so['failed']} failed; AUC central driven by {so['top_auc_central']}")
    print(f"load average at end: {load_average()}")


if __name__ == "__main__":
    main()
