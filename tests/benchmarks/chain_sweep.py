"""Sweep the default's choice on linear chain networks: is it within 1.3x of the fastest path?

Issue 12 asks of the default (``auto``) that on every network shape it be within 1.3x of the
fastest correct integrator of the project. On a linear chain network
(:func:`~barrierflow.engine.exact_chain.chain_order`) it chooses between the exact chain path and
RODAS4 by their estimated costs (``integrators.estimated_seconds``, ``"chain"`` and ``"rodas"``);
this script times the default, the exact chain path and RODAS4 on:

* the benchmark's chain variants (tests/benchmarks/run_benchmark.py: the patch of
  scenarios/benchmark_patch.toml, an invented scenario, at 20, 50, 200 and 800 cells, the patch
  of 0.1 mL, an output time 0.36 s after a dose), the patch with output every minute (10,081 rows)
  and with the patch replaced every 2 h (84 dosing intervals);
* rows of barriers: a patch, 2 to 8 barriers of three layers in a row with a compartment between
  each two (invented), to central, as in the benchmark patch;
* random networks of the property tests' generator (``tests/random_networks.py``, linear, as
  ``tests/test_split_random.py`` draws its networks but without the saturable elimination) that
  the chain path takes.

Each path runs once to compile and warm, then ``--runs`` rounds in a shuffled order; the shortest
of each counts. Prints per case the path the default took, the features of the estimate (states,
output rows, intervals, modes not decayed at the chain's cut), the times, the estimates and
default / fastest (measured, and with the default's path timed as that path: less noisy), then
the cases above 1.3x by the second. The machine is shared: state its load (``uptime``), compare
ratios within one run.

Usage: ``.venv/bin/python tests/benchmarks/chain_sweep.py [--runs N] [--random N] [--match TEXT]``
"""

from __future__ import annotations

import argparse
import random
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))  # the tests' helpers (random networks)
from path_timing import LIMIT, judge, min_times, summary  # noqa: E402
from random_networks import random_scenario  # noqa: E402
from run_benchmark import CELLS_800, NEAR_EVENT, Variant  # noqa: E402

import barrierflow as bf  # noqa: E402
from barrierflow.engine import compile_scenario, solve  # noqa: E402
from barrierflow.engine.exact import ExactIntegrator, exact_plan, mode_time  # noqa: E402
from barrierflow.engine.integrators import chain_modes, chain_rows, estimated_seconds  # noqa: E402
from barrierflow.engine.rosenbrock import RosenbrockIntegrator  # noqa: E402
from barrierflow.engine.schedule import build_schedule  # noqa: E402

PATHS = {"default": None, "exact": ExactIntegrator(method="chain"), "rodas": RosenbrockIntegrator()}

LAYERS = """  [[barrier.layer]]
  thickness = "15 um"
  diffusivity = "1e-9 cm^2/s"
  partition = 10
  cells = {cells}
  [[barrier.layer]]
  thickness = "100 um"
  diffusivity = "1e-6 cm^2/s"
  cells = {cells}
  [[barrier.layer]]
  thickness = "1000 um"
  diffusivity = "1e-6 cm^2/s"
  cells = {cells}
"""


def row_text(barriers: int, cells: int) -> str:
    """An invented row of ``barriers`` barriers: patch, barrier, compartment, barrier, ..., central."""
    names = ["patch"] + [f"c{i}" for i in range(1, barriers)] + ["central"]
    text = ('[scenario]\nname = "row of barriers (invented)"\nduration = "7 d"\noutput_step = "1 h"\n\n'
            '[[compartment]]\nid = "patch"\nvolume = "1 mL"\ninitial_concentration = "10 mg/mL"\n\n')
    for c in names[1:-1]:
        text += f'[[compartment]]\nid = "{c}"\nvolume = "2 mL"\n\n'
    text += '[[compartment]]\nid = "central"\nvolume = "5 L"\nclearance = "10 L/h"\n\n'
    for i in range(barriers):
        text += (f'[[barrier]]\nid = "b{i}"\nfrom = "{names[i]}"\nto = "{names[i + 1]}"\narea = "10 cm^2"\n'
                 + LAYERS.format(cells=cells) + "\n")
    return text


def linear_networks(count: int, first: int = 0):
    """The first ``count`` random networks from ``first`` on (the draws of test_split_random.py,
    linear) that the exact chain path takes."""
    found, i = 0, first
    while found < count:
        s = random_scenario(random.Random(i), max_comp=4, small_grid=True, default_grid=True, max_barriers=2,
                            min_barriers=1, linear=True)
        i += 1
        if exact_plan(compile_scenario(s))[0] == "chain":
            found += 1
            yield f"random network {i - 1}", s


def cases(n_random: int):
    tmp = Path(tempfile.mkdtemp())
    f = tmp / "c.toml"
    for v in (Variant("50 cells", 50), Variant("20 cells", 20), Variant("200 cells", 200),
              Variant("finite dose 0.1 mL", patch_volume_ml=0.1), Variant(CELLS_800, (267, 267, 266)),
              Variant(NEAR_EVENT, 200, extra_times=(24.0 + 1e-4,))):
        f.write_text(v.toml())
        yield f"benchmark: {v.label}", bf.load(f)
    f.write_text(Variant("s", 50).toml().replace('output_step = "10 min"', 'output_step = "1 min"'))
    yield "benchmark patch, output every minute", bf.load(f)
    f.write_text(Variant("s", 50).toml().replace('every = "24 h"\ncount = 6', 'every = "2 h"\ncount = 83')
                 .replace('at = "24 h"', 'at = "2 h"'))
    yield "benchmark patch, replaced every 2 h", bf.load(f)
    for barriers in (2, 4, 8):
        for cells in (5, 20):
            f.write_text(row_text(barriers, cells))
            yield f"row of {barriers} barriers, {cells} cells a layer", bf.load(f)
    yield from linear_networks(n_random)


def time_paths(scenario, runs: int) -> dict:
    """min wall time (s) and the path taken per path."""
    out = {}
    for name, ig in PATHS.items():
        tr = solve(scenario, ig)  # compiled and warm
        out[name] = {"t": np.inf, "took": tr.integrator, "fell": tr.stats["fallbacks"] > 0}
    min_times(scenario, PATHS, list(PATHS), out, runs)
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--random", type=int, default=24, help="random networks of the generator")
    ap.add_argument("--match", default="", help="only the cases whose label contains this")
    args = ap.parse_args()
    worst = []
    print(f"{'case':52s} {'default':>7s} {'states':>6s} {'rows':>5s} {'int':>3s} {'early':>5s} {'default':>9s} "
          f"{'exact':>9s} {'RODAS4':>9s} {'est ex':>8s} {'est R4':>8s} {'def/fast':>8s} {'path/fast':>9s}")
    for label, s in cases(args.random):
        if args.match not in label:
            continue
        m = compile_scenario(s)
        try:
            r = time_paths(s, args.runs)
            tr = solve(s, PATHS["rodas"])
        except Exception as err:  # noqa: BLE001 - a sweep reports and goes on
            print(f"{label:52s} failed: {err}", flush=True)
            continue
        times = np.asarray(tr.times)
        marks = np.array(sorted({e.time for e in build_schedule(s, m.comp_index) if e.time < s.duration}
                                | {0.0, s.duration}))
        shortest = mode_time(times, marks)
        rows, n_int = len(times), len(marks) - 1
        early = chain_rows(m, times, marks, shortest)
        est_ex = estimated_seconds("chain", m, rows, n_int, shortest=shortest, early=early)
        est_r4 = estimated_seconds("rodas", m, rows, n_int)
        ratio, by_path, took = judge(r, {"exact": "exact", "rodas4": "rodas"})
        print(f"{label:52s} {took:>7s} {m.n_state:6d} {rows:5d} {n_int:3d} {early:5d} {r['default']['t'] * 1e3:7.2f}ms "
              f"{r['exact']['t'] * 1e3:7.2f}ms {r['rodas']['t'] * 1e3:7.2f}ms {est_ex * 1e3:6.2f}ms "
              f"{est_r4 * 1e3:6.2f}ms {ratio:7.2f}x {by_path:8.2f}x"
              f"  modes {chain_modes(m, 60.0 / shortest):6.1f} nd {m.n_dyn}"
              + ("  <-- above 1.3x" if by_path > LIMIT else ""),
              flush=True)
        worst.append((by_path, label))
    print(summary(worst, "it fell back"))


if __name__ == "__main__":
    main()
