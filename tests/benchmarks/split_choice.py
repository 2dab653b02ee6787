"""Time the split path and RODAS4 on saturable chain networks and fit the default's choice between them.

The shapes: the benchmark's saturable patch (scenarios/benchmark_patch.toml with vmax 0.1 mg/h
and km 2e-5 mg/mL on central, an invented scenario) with 2 to 200 cells a layer, 1 to 14
applications over its 7 days (the first at 0 h, the others evenly spaced), output every 10 min or
every hour, and a patch of 1 mL or 0.1 mL. Each path runs ``--runs`` times per shape, the two
alternating; the shortest counts. Prints one line per shape, then the robust fit (least squares
with a soft-L1 loss) of log(split / RODAS4) against log(intervals) on these shapes alone (whose
elimination's sharpness changes only with the intervals; ``integrators.SPLIT_RATIO`` and
``SPLIT_SHARPNESS`` are fitted to the wider sweep of tests/benchmarks/saturable_sweep.py), and
how often choosing by the fitted ratio and by the product's current estimate keeps the choice
within 1.3x of the faster path (whether the default may take the split at all is
``integrators.SPLIT_BY_DEFAULT``).

Usage: ``.venv/bin/python tests/benchmarks/split_choice.py [--runs N]``. The machine is shared:
state its load (``uptime``) with the figures.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
from run_benchmark import Variant
from scipy.optimize import least_squares

import barrierflow as bf
from barrierflow.engine import SplitIntegrator, compile_scenario, solve
from barrierflow.engine.integrators import SPLIT_RATIO, estimated_seconds
from barrierflow.engine.rosenbrock import RosenbrockIntegrator


def scenario_text(cells: int, doses: int, step: str, patch_ml: float) -> str:
    """The saturable variant with ``doses`` replacements of the patch after the first application."""
    text = Variant("s", cells=cells, saturable=True, patch_volume_ml=patch_ml).toml()
    text = text.replace('output_step = "10 min"', f'output_step = "{step}"')
    head = text[:text.index("[[dose]]")]
    if doses == 0:
        return head
    every = 168.0 / (doses + 1)
    return head + (f'[[dose]]\ntarget = "patch"\nkind = "replace"\nconcentration = "10 mg/mL"\n'
                   f'at = "{every} h"\nevery = "{every} h"\ncount = {doses}\n')


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=15)
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp())
    paths = (("split", SplitIntegrator()), ("rodas", RosenbrockIntegrator()))
    recs = []
    for cells in (2, 5, 10, 20, 35, 50, 100, 200):
        for doses in (0, 1, 3, 6, 13):
            for step in ("10 min", "1 h"):
                for patch in (1.0, 0.1) if doses in (0, 6) else (1.0,):
                    f = tmp / "s.toml"
                    f.write_text(scenario_text(cells, doses, step, patch))
                    s = bf.load(f)
                    best = {}
                    for _name, ig in paths:
                        solve(s, ig)  # compiled and warm
                    for _ in range(args.runs):
                        for name, ig in paths:
                            t0 = time.perf_counter()
                            solve(s, ig)
                            best[name] = min(best.get(name, np.inf), time.perf_counter() - t0)
                    rows = len(solve(s, paths[1][1]).times)
                    m = compile_scenario(s)
                    cheaper = (estimated_seconds("split", m, rows, doses + 1, 168.0 / (doses + 1))
                               < estimated_seconds("rodas", m, rows, doses + 1))
                    chosen = "split" if cheaper else "rodas4"  # by the estimate (SPLIT_BY_DEFAULT aside)
                    recs.append((doses + 1, best["split"], best["rodas"], chosen))
                    print(f"{cells:4d} cells a layer, {doses + 1:2d} applications, every {step:6s}, "
                          f"patch {patch:g} mL: split {best['split'] * 1e3:7.2f} ms, "
                          f"RODAS4 {best['rodas'] * 1e3:7.2f} ms, the estimate chooses {chosen}", flush=True)
    iv = np.array([r[0] for r in recs], float)
    ts = np.array([r[1] for r in recs])
    tr = np.array([r[2] for r in recs])
    y = np.log(ts / tr)
    fit = least_squares(lambda c: c[0] + c[1] * np.log(iv) - y, np.zeros(2), loss="soft_l1", f_scale=0.1).x
    fast = np.minimum(ts, tr)

    def within(split_chosen: np.ndarray) -> int:
        return int(np.sum(np.where(split_chosen, ts, tr) / fast <= 1.3))

    fitted = np.exp(fit[0]) * iv ** fit[1] < 1.0
    current = np.array([r[3] == "split" for r in recs])
    print(f"\nfitted ratio split / RODAS4 = {np.exp(fit[0]):.3g} * intervals ** {fit[1]:.3g} "
          f"(SPLIT_RATIO now {SPLIT_RATIO})")
    print(f"choice within 1.3x of the faster path: by the fitted ratio {within(fitted)} of {len(recs)}, "
          f"by the product's estimate {within(current)}")


if __name__ == "__main__":
    main()
