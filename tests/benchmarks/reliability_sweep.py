"""Reliability sweep: the default engine on many random valid networks against scipy's Radau.

Each network (``tests/random_networks.py``, invented scenarios) runs on the default path
(``barrierflow.simulate``, with its guard) and on scipy's Radau at rtol 1e-10 (Hairer and Wanner,
Solving Ordinary Differential Equations II, 2nd ed., 1996, sec. IV.8) on the same grid. Printed:
how many networks, which path ran them, how many were refused or failed, the largest error of
each state relative to its magnitude scale, the mass-balance errors and the most negative
concentration, with the seeds of the worst cases so that they can be run again.

With ``--refined`` the networks are those of ``tests/test_properties_refined.py`` (every layer on
the default grid, one or two barriers) and the reference is Radau on the default grid with each
cell cut into 2 and into 4: printed are each path's largest error, over each grid-free quantity's
magnitude scale, against the 4-times grid, and the 2- against the 4-times grid (how far the
references themselves are from the limit: on a second-order grid the 4-times grid is about a
third of that away).

    .venv/bin/python tests/benchmarks/reliability_sweep.py -n 500 --seed 0
    .venv/bin/python tests/benchmarks/reliability_sweep.py --refined -n 300
"""

from __future__ import annotations

import argparse
import collections
import random
import signal
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import random_networks  # noqa: E402

import barrierflow as bf  # noqa: E402
from barrierflow.engine import ScipyIntegrator, solve  # noqa: E402


class _Timeout(Exception):
    pass


def _alarm(signum, frame):
    raise _Timeout()


def run_one(seed: int, small_grid: bool, limit: float) -> dict:
    s = random_networks.random_scenario(random.Random(seed), small_grid=small_grid)
    out: dict = {"seed": seed}
    signal.signal(signal.SIGALRM, _alarm)
    signal.alarm(int(limit))
    try:
        t0 = time.perf_counter()
        try:
            tr = solve(s)
        except bf.SolverError as err:
            out["outcome"] = "solver error"
            out["message"] = str(err)[:200]
            return out
        except bf.ScenarioError as err:
            out["outcome"] = "refused"
            out["message"] = str(err)[:200]
            return out
        out["time"] = time.perf_counter() - t0
        out["path"] = tr.integrator
        out["fallback"] = bool(tr.stats.get("fallbacks", 0))
        r = bf.Result(s, tr)
        out["mb"] = r.mass_balance.relative_error
        m = tr.model
        out["neg"] = float(np.min(tr.states[:, : m.n_dyn] / m.scale[: m.n_dyn], initial=0.0))
        try:
            ref = solve(s, ScipyIntegrator("Radau", rtol=1e-10, atol=1e-13), grid=tr.grid)
        except (bf.SolverError, _Timeout):
            out["outcome"] = "no reference"
            return out
        if ref.states.shape != tr.states.shape:
            out["outcome"] = "no reference"
            return out
        out["err"] = float(np.max(np.abs(tr.states - ref.states) / m.scale, initial=0.0))
        out["outcome"] = "ran"
    except _Timeout:
        out["outcome"] = "timeout"
    finally:
        signal.alarm(0)
    return out


def run_refined(seed: int, limit: float) -> dict:
    """One network of the refined-grid property test: each path against Radau on finer grids."""
    from test_properties_refined import SplitGrid, network, refined_error

    from barrierflow.engine.exact import ExactIntegrator
    from barrierflow.engine.rosenbrock import RosenbrockIntegrator

    s = network(random.Random(seed))
    out: dict = {"seed": seed}
    signal.signal(signal.SIGALRM, _alarm)
    signal.alarm(int(limit))
    try:
        tr = solve(s)
        out["path"] = tr.integrator
        out["cells"] = tr.model.n_cells
        refs = {k: solve(s, ScipyIntegrator("Radau", rtol=1e-10, atol=1e-13), grid=SplitGrid(split=k)) for k in (2, 4)}
        out["err"] = {"default": refined_error(tr, refs[4])}
        out["ref2"] = refined_error(refs[2], refs[4])
        try:
            out["err"]["rodas4"] = refined_error(solve(s, RosenbrockIntegrator(), fallback=False), refs[4])
        except bf.SolverError:
            pass
        if tr.model.is_linear:
            for method in ("chain", "modes", "expm"):
                try:
                    ex = solve(s, ExactIntegrator(method), fallback=False, raise_on_failure=False)
                except bf.ScenarioError:
                    continue
                if ex.status == 0:
                    out["err"][method] = refined_error(ex, refs[4])
        out["outcome"] = "ran"
    except _Timeout:
        out["outcome"] = "timeout"
    except bf.SolverError as err:
        out["outcome"] = "solver error"
        out["message"] = str(err)[:200]
    finally:
        signal.alarm(0)
    return out


def main_refined(args) -> int:
    rows = []
    start = time.perf_counter()
    for seed in range(args.seed, args.seed + args.n):
        row = run_refined(seed, args.limit)
        rows.append(row)
        if row["outcome"] != "ran" or max(row["err"].values()) > args.tol:
            print(f"seed {seed}: {row}", flush=True)
    ran = [r for r in rows if r["outcome"] == "ran"]
    print(f"\n{len(rows)} networks (default grids) in {time.perf_counter() - start:.0f} s: "
          f"{dict(collections.Counter(r['outcome'] for r in rows))}; default path: "
          f"{dict(collections.Counter(r['path'] for r in ran))}")
    if not ran:
        return 0
    cells = np.array([r["cells"] for r in ran])
    print(f"cells per network: median {np.median(cells):.0f}, max {cells.max()}")
    for path in ("default", "rodas4", "chain", "modes", "expm"):
        errs = [(r["err"][path], r["seed"]) for r in ran if path in r["err"]]
        if errs:
            e = np.array([x for x, _ in errs])
            print(f"{path:8s} vs Radau on the 4-times grid: {len(e)} networks, median {np.median(e):.2e}, "
                  f"max {e.max():.2e} (seed {errs[int(e.argmax())][1]}); "
                  f"above {args.tol:g}: {int((e > args.tol).sum())}")
    r2 = np.array([r["ref2"] for r in ran])
    print(f"2-times against 4-times grid: median {np.median(r2):.2e}, max {r2.max():.2e}")
    return 0


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("-n", type=int, default=300, help="number of networks (default 300)")
    p.add_argument("--seed", type=int, default=0, help="first seed (default 0)")
    p.add_argument("--small-grid", action="store_true", help="2 to 8 cells per layer (faster references)")
    p.add_argument("--limit", type=float, default=60.0, help="seconds allowed per network (default 60)")
    p.add_argument("--tol", type=float, default=None,
                   help="scaled error counted as a disagreement (default 1e-4; 1e-3 with --refined)")
    p.add_argument("--refined", action="store_true",
                   help="default grids against Radau on grids 2 and 4 times finer (the refined property test)")
    args = p.parse_args(argv)
    if args.refined:
        args.tol = 1e-3 if args.tol is None else args.tol
        return main_refined(args)
    args.tol = 1e-4 if args.tol is None else args.tol
    rows = []
    start = time.perf_counter()
    for seed in range(args.seed, args.seed + args.n):
        row = run_one(seed, args.small_grid, args.limit)
        rows.append(row)
        bad = row.get("outcome") == "ran" and (row["err"] > args.tol or row["mb"] > 1e-6 or row["neg"] < -1e-6)
        if bad or row["outcome"] not in ("ran",):
            print(f"seed {seed}: {row}", flush=True)
    outcomes = collections.Counter(r["outcome"] for r in rows)
    ran = [r for r in rows if r["outcome"] == "ran"]
    paths = collections.Counter(r["path"] for r in rows if "path" in r)
    print(f"\n{len(rows)} networks in {time.perf_counter() - start:.0f} s: {dict(outcomes)}")
    print(f"paths: {dict(paths)}; recomputed by the guard: {sum(r.get('fallback', False) for r in rows)}")
    if ran:
        err = np.array([r["err"] for r in ran])
        mb = np.array([r["mb"] for r in ran])
        neg = np.array([r["neg"] for r in ran])
        tm = np.array([r["time"] for r in ran])
        print(f"scaled error vs Radau: median {np.median(err):.2e}, 99th pct {np.percentile(err, 99):.2e}, "
              f"max {err.max():.2e} (seed {ran[int(err.argmax())]['seed']}); above {args.tol:g}: "
              f"{int((err > args.tol).sum())}")
        print(f"mass balance: median {np.median(mb):.2e}, max {mb.max():.2e}; above 1e-6: {int((mb > 1e-6).sum())}")
        print(f"most negative concentration / scale: {neg.min():.2e}")
        print(f"default-path time: median {np.median(tm) * 1e3:.1f} ms, max {tm.max():.2f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
