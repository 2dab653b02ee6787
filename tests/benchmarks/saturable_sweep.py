"""Sweep the default's choice over networks with saturable elimination: is it within 1.3x of the fastest path?

Issue 12 asks of the default (``auto``) that on every network shape it be within 1.3x of the
fastest correct integrator of the project. On a chain network with the saturable (Michaelis-Menten)
elimination of one compartment it chooses between the split path (``engine/split.py``) and RODAS4
(``integrators.AutoIntegrator``); this script times both and the default on:

* the benchmark's patch (scenarios/benchmark_patch.toml, an invented scenario) with 10 or 50 cells a
  layer and saturable elimination on central: km from 1e-7 to 1e2 times central's concentration
  scale (``CompiledModel.scale``), vmax such that the elimination at c = km removes 0.01, 1 or 100
  times what the clearance removes at central's scale, the patch at 10 mg/mL or 1e-4 of it (so that
  central's concentration crosses km or stays below it), a single application or the daily
  replacements of the file;
* the benchmark's saturable variant (vmax 0.1 mg/h, km 2e-5 mg/mL on central) with 1 to 14
  applications over its 7 days (as tests/benchmarks/split_choice.py makes them);
* random networks of the property tests' generator (``tests/random_networks.py``) that the split
  applies to, and the two networks of ``tests/test_split_random.py``.

Each path runs once to compile and warm, then ``--runs`` rounds in a shuffled order; the shortest
of each counts. Prints per case the path the default took, the steps of each, the times and
default / fastest (measured, and with the default's path timed as that path: less noisy), then the
cases above 1.3x by the second. The machine is shared: state its load (``uptime``),
compare ratios within one run.

Usage: ``.venv/bin/python tests/benchmarks/saturable_sweep.py [--runs N] [--quick] [--random N]``
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))  # the tests' helpers (random networks)
from path_timing import LIMIT, judge, min_times, summary  # noqa: E402
from run_benchmark import Variant  # noqa: E402
from split_choice import scenario_text  # noqa: E402
from test_split_random import saturable_alone, sharp_elimination, split_networks  # noqa: E402

import barrierflow as bf  # noqa: E402
from barrierflow.engine import SplitIntegrator, compile_scenario, solve  # noqa: E402
from barrierflow.engine.rosenbrock import RosenbrockIntegrator  # noqa: E402

PATHS = {"default": None, "split": SplitIntegrator(), "rodas": RosenbrockIntegrator()}


def patch_text(cells: int, km: float | None, vmax: float, dose: float, repeated: bool) -> str:
    """The benchmark patch with ``cells`` a layer, the patch at ``dose`` mg/mL, saturable
    elimination on central (none when ``km`` is None) and its daily replacements or none."""
    text = Variant("s", cells=cells).toml().replace('"10 mg/mL"', f'"{dose:.6g} mg/mL"')
    if km is not None:
        text = text.replace('clearance = "10 L/h"', f'clearance = "10 L/h"\nvmax = "{vmax:.6g} mg/h"\n'
                                                    f'km = "{km:.6g} mg/mL"')
    if not repeated:
        text = text[:text.index("[[dose]]")]
    return text


def time_paths(scenario, runs: int) -> dict:
    """min wall time (s), path taken, steps and message per path."""
    out = {}
    for name, ig in PATHS.items():
        solve(scenario, ig)  # compiled and warm
        t0 = time.perf_counter()
        tr = solve(scenario, ig)
        # a path that takes seconds (the split on a sharp elimination) is timed by its warm run alone
        out[name] = {"t": np.inf if time.perf_counter() - t0 < 1.0 else time.perf_counter() - t0,
                     "took": tr.integrator, "steps": tr.stats["steps"] + tr.stats["rejected_steps"],
                     "fell": "computed on" in tr.message or tr.stats["fallbacks"] > 0}
    timed = [k for k in PATHS if out[k]["t"] == np.inf]
    min_times(scenario, PATHS, timed, out, runs)
    return out


def cases(quick: bool, n_random: int, cells_set: tuple[int, ...] | None = None, min_km: float = 0.0):
    tmp = Path(tempfile.mkdtemp())
    cells_set = cells_set or ((10,) if quick else (10, 50))
    for cells in cells_set:
        f = tmp / "p.toml"
        f.write_text(patch_text(cells, None, 0.0, 10.0, True))
        m = compile_scenario(bf.load(f))
        c_scale = float(m.scale[m.comp_index["central"]])
        cl = 10000.0  # mL/h
        for rel_km in (k for k in (1e-7, 1e-5, 1e-3, 1e-1, 1e1, 1e2) if k >= min_km):
            for strength in (0.01, 1.0, 100.0):
                km = rel_km * c_scale
                # at c = km the elimination removes vmax / 2: strength times what the clearance removes at
                # central's scale
                vmax = 2.0 * strength * cl * c_scale
                for dose in (10.0, 1e-3):
                    for repeated in (False, True):
                        f.write_text(patch_text(cells, km, vmax, dose, repeated))
                        label = (f"patch {cells:2d} cells, km {rel_km:7.0e} scale, vmax x{strength:<5g} "
                                 f"dose {dose:<6g} {'daily ' if repeated else 'single'}")
                        yield label, bf.load(f)
        for doses in (0, 1, 3, 6, 13):  # the benchmark's saturable variant, 1 to 14 applications
            f.write_text(scenario_text(cells, doses, "10 min", 1.0))
            yield f"benchmark's saturable variant, {cells:2d} cells, {doses + 1:2d} applications", bf.load(f)
    yield "random: sharp elimination behind a thin barrier", sharp_elimination()
    yield "random: saturable compartment linked to nothing", saturable_alone()
    for seed, s in split_networks(n_random):
        yield f"random network, seed {seed}", s


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--quick", action="store_true", help="10 cells a layer only")
    ap.add_argument("--cells", type=int, nargs="*", default=None, help="cells a layer of the patch (10 50)")
    ap.add_argument("--random", type=int, default=12, help="random networks of the generator")
    ap.add_argument("--match", default="", help="only the cases whose label contains this")
    ap.add_argument("--min-km", type=float, default=0.0, help="only patches with km at least this share of the scale")
    args = ap.parse_args()
    worst = []
    print(f"{'case':72s} {'default':>7s} {'steps d/s/r':>17s} {'default':>9s} {'split':>9s} {'RODAS4':>9s} "
          f"{'def/fast':>8s} {'path/fast':>9s}")
    for label, s in cases(args.quick, args.random, tuple(args.cells) if args.cells else None, args.min_km):
        if args.match not in label:
            continue
        try:
            r = time_paths(s, args.runs)
        except Exception as err:  # noqa: BLE001 - a sweep reports and goes on
            print(f"{label:72s} failed: {err}", flush=True)
            continue
        m = compile_scenario(s)
        ic = int(m.mm_state[0])
        sharp = float(m.mm_vmax[0] / (m.mm_km[0] * m.capacity[ic]))  # 1/h, the elimination's rate below km
        marks = sorted({0.0, s.duration} | {e.time for e in solve(s, PATHS["rodas"]).events if e.time < s.duration})
        ratio, by_path, took = judge(r, {"split": "split", "rodas4": "rodas"})
        print(f"{label:72s} {took:>7s} {r['default']['steps']:5d}/{r['split']['steps']:5d}/{r['rodas']['steps']:5d} "
              f"{r['default']['t'] * 1e3:7.2f}ms {r['split']['t'] * 1e3:7.2f}ms {r['rodas']['t'] * 1e3:7.2f}ms "
              f"{ratio:7.2f}x {by_path:8.2f}x  rate x interval {sharp * float(np.diff(marks).max()):8.2e}, "
              f"{len(marks) - 1} intervals, {m.n_state} states" + ("  <-- above 1.3x" if by_path > LIMIT else ""),
              flush=True)
        worst.append((by_path, label))
    print(summary(worst, "it went to RODAS4 on the way"))


if __name__ == "__main__":
    main()
