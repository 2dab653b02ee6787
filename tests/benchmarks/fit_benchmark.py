"""Speed of `barrierflow fit`: a two-parameter fit of 3 replicates, and a profile-likelihood interval.

Goals (issue 14): the fit under 2 s and one profile-likelihood interval under 10 s on this machine.
Two problems, both invented:

* the diffusion cell (scenarios/diffusion_cell.toml) with the invented replicate data of the
  README (data/diffusion_cell_replicates.csv): D and K of the membrane;
* the benchmark problem of the project (scenarios/benchmark_patch.toml, 7 days, 150 cells,
  daily refills), with 3 replicates of plasma concentrations made from the engine at other
  values of the outer layer's D and K, with 5 % noise: those D and K.

In the same run, as baselines: the time of one engine run (``simulate`` of the scenario with
the data's output times), so that a fit reads as a number of runs; and what a user writes by
hand around ``simulate``: ``scipy.optimize.least_squares`` on the parameters themselves with its
default forward differences, every evaluation simulating the scenario's own output grid (the 40
lines the issue describes, shortened). Times are medians of several rounds after a warm-up;
the machine is shared, so the ratios mean more than the seconds.

Usage: ``.venv/bin/python tests/benchmarks/fit_benchmark.py [--rounds N]``.
"""

from __future__ import annotations

import argparse
import statistics
import time
from pathlib import Path

import numpy as np
from scipy import optimize

import barrierflow as bf
from barrierflow.model.experiment import Experiment, Series
from barrierflow.studies.fit import fit

ROOT = Path(__file__).resolve().parents[2]
CELL = ROOT / "scenarios" / "diffusion_cell.toml"
CELL_DATA = ROOT / "data" / "diffusion_cell_replicates.csv"
PATCH = ROOT / "scenarios" / "benchmark_patch.toml"
CELL_FREE = ["barrier.membrane.layer.1.diffusivity", "barrier.membrane.layer.1.partition"]
PATCH_FREE = ["barrier.skin.layer.1.diffusivity", "barrier.skin.layer.1.partition"]


def timed(fn, rounds):
    fn()  # warm-up (compiled code loaded, caches filled)
    times = []
    for _ in range(rounds):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), out


def patch_data(scenario):
    times = tuple(float(t) for t in (1, 2, 4, 8, 12, 24, 36, 48, 72, 96, 120, 144, 168))
    truth = bf.with_values(scenario, {PATCH_FREE[0]: 1.4e-9 * 3600, PATCH_FREE[1]: 7.0,
                                      "scenario.output_step": None, "scenario.output_times": times})
    c = bf.simulate(truth).concentration("central")
    rng = np.random.default_rng(7)
    series = tuple(Series("conc", "central", str(i + 1), tuple(c * (1 + 0.05 * rng.standard_normal(len(c)))),
                          "mg/mL") for i in range(3))
    return Experiment(times, series, "h", "invented plasma data")


def by_hand(scenario, experiment, free):
    """A user's fit: least_squares on the values themselves, forward differences, full output grid."""
    paths = [bf.ParamPath.parse(p) for p in free]
    x0 = np.array([p.get(scenario) for p in paths])
    series = experiment.series
    quantity, target = series[0].quantity, series[0].target
    y = np.concatenate([s.array for s in series])
    ok = np.isfinite(y)
    t_data = experiment.time_array

    def residuals(x):
        r = bf.simulate(bf.with_values(scenario, dict(zip(paths, x, strict=True))))
        trace = r.permeated(target) if quantity == "permeated" else r.concentration(target)
        f = np.interp(t_data, r.times, trace)
        f = np.concatenate([f] * len(series))
        return ((y - f) / np.where(y > 0, y, 1.0))[ok]

    sol = optimize.least_squares(residuals, x0, x_scale=x0, bounds=(0, np.inf))
    return sol.nfev, 2.0 * sol.cost


def one_run(scenario, experiment):
    s = bf.with_values(scenario, {"scenario.output_step": None,
                                  "scenario.output_times": tuple(sorted({0.0, *experiment.times}))})
    return lambda: bf.simulate(s)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rounds", type=int, default=5)
    args = ap.parse_args()
    print("barrierflow fit benchmark (invented problems; medians of", args.rounds, "rounds after a warm-up)")
    print()
    rows = []
    for name, scenario, experiment, free in (
            ("diffusion cell, 3 replicates x 12 times", bf.load(CELL), bf.load_experiment(CELL_DATA), CELL_FREE),
            ("benchmark patch, 3 replicates x 13 times", bf.load(PATCH), None, PATCH_FREE)):
        if experiment is None:
            experiment = patch_data(scenario)
        run_t, _ = timed(one_run(scenario, experiment), max(args.rounds, 20))
        fit_t, result = timed(lambda s=scenario, e=experiment, f=free: fit(
            s, e, f, weights="1/y^2", profile=False, replicates=False), args.rounds)
        runs = result.evaluations
        prof_t, presult = timed(lambda s=scenario, e=experiment, f=free: fit(
            s, e, f, weights="1/y^2", profile=True, replicates=False), max(1, args.rounds // 2))
        profile_one = presult.timings["profile_s"] / len(free)
        full_t, _ = timed(lambda s=scenario, e=experiment, f=free: fit(s, e, f, weights="1/y^2"),
                          max(1, args.rounds // 2))
        hand_t, (hand_nfev, hand_wrss) = timed(lambda s=scenario, e=experiment, f=free: by_hand(s, e, f),
                                               max(1, args.rounds // 2))
        rows.append((name, run_t, fit_t, runs, profile_one, full_t, hand_t, hand_nfev, hand_wrss, result))
    for name, run_t, fit_t, runs, profile_one, full_t, hand_t, hand_nfev, hand_wrss, result in rows:
        d, k = result.parameters
        print(f"{name}")
        print(f"  one engine run (the data's times)     {run_t * 1e3:8.2f} ms")
        print(f"  fit of D and K (1/y^2)                {fit_t:8.3f} s   = {fit_t / run_t:7.0f} runs' time "
              f"({runs} runs, with the set-up)   goal < 2 s: {'met' if fit_t < 2 else 'NOT met'}")
        print(f"  one profile-likelihood interval       {profile_one:8.3f} s   = {profile_one / run_t:7.0f} runs' "
              f"time   goal < 10 s: {'met' if profile_one < 10 else 'NOT met'}")
        print(f"  everything (fit, 2 profiles, 3 replicate fits) {full_t:6.3f} s")
        print(f"  by hand (least_squares around simulate) {hand_t:6.3f} s   ({hand_nfev} evaluations, no SEs; "
              f"time ratio hand/fit {hand_t / fit_t:.2f}; its weighted RSS {hand_wrss:.4g} against the fit's "
              f"{result.wrss:.4g})")
        print(f"  estimates: D {d.estimate / 3600:.4g} cm^2/s (CV {100 * d.cv:.2g} %), K {k.estimate:.4g} "
              f"(CV {100 * k.cv:.2g} %), converged {result.converged}")
        print()


if __name__ == "__main__":
    main()
