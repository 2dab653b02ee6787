"""Adversarial sweep: does the default (or any product path) return a wrong result?

Every scenario (invented) runs on the default (``barrierflow.simulate``: the engine's choice and
its guard) and on each product path that accepts it (RODAS4; the split path where
``split.linear_part`` applies; the exact chain, modes and matrix-exponential paths on a linear
model), each without the guard's second attempt, and on the reference: scipy's Radau IIA at rtol
1e-10, atol 1e-13 of each state's scale (Hairer and Wanner, Solving Ordinary Differential
Equations II, 2nd ed., 1996, sec. IV.8) on the SAME grid (the grid the default chose), so that
both solve the same finite-volume model and only the time integration is compared.

Compared are every state (the full states, over each state's magnitude scale
``CompiledModel.scale``) and every column of the exported CSV (``Result.columns``), each over its
own scale: the column's largest magnitude in the reference, with a floor of 1e-4 of what the run's
largest amount would be in that column (:data:`FLOOR`), so a column that stays near zero is not
judged on its rounding.
The accuracy contract (/work/shared/spec/benchmark.md): a concentration within 1e-5 of its peak,
a cumulative amount within 1e-6 of its final value; the same measure is applied to every column
of its kind (cumulative: permeated, eliminated, degraded, removed, dosed; the others 1e-5).

Each run is classified: ``accurate`` (within the contract), ``refused`` (a ScenarioError or
SolverError, or status -1: a clear refusal), ``marginal`` (beyond the contract by at most
:data:`MARGIN`, every state within 1e-4 of its scale: what the product's tolerances give),
``wrong`` (returned, further off). Also
checked: the result's reported mass balance (``Result.mass_balance``) against the reference's
ledger (present, eliminated, degraded, removed, dosed) and that its relative error is below 1e-6.

Scenario kinds:

* ``random``: seeded networks of the property tests' generator (``tests/random_networks.py``):
  small grids, default grids, saturable chain networks (the split path);
* ``extreme``: a patch on a two-compartment body (the benchmark's shape) with one to four
  extreme changes drawn at random: partition 1e-4..1e4, diffusivity 1e-12..1e-3 cm^2/s,
  thickness 1e-5..1 cm, fast degradation in a layer at the default grid, clearance very fast or
  very slow, tiny or huge volumes, saturable elimination with km 1e-8..1e3 mg/mL, repeated
  patches, patch removal, wash-off, infusion, output times close to events, many layers, a
  steady barrier beside a resolved one, exchanges and transfers.

Run (niced; about 1-4 s a scenario)::

    nice -n 19 .venv/bin/python tests/benchmarks/adversarial_sweep.py --kind random -n 200 --seed 0
    nice -n 19 .venv/bin/python tests/benchmarks/adversarial_sweep.py --kind extreme -n 200 --seed 0

With ``--refined`` the default grid itself is judged: the default against Radau on the default
grid with every cell cut in three, the grid-free columns within 1e-3 of their scale (the promise of
DEVELOPERS.md); scenarios whose layers have their own ``cells`` are skipped.

Prints one line per scenario that is not accurate on some path (seed, path, worst column, error)
and a table of outcomes per path. ``--show SEED`` prints the scenario of one seed as TOML.
"""

from __future__ import annotations

import argparse
import collections
import math
import random
import signal
import sys
import time
import traceback
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import random_networks  # noqa: E402

import barrierflow as bf  # noqa: E402
from barrierflow import Barrier, Compartment, Dose, Exchange, Layer, Scenario, Transfer  # noqa: E402
from barrierflow.engine import (  # noqa: E402
    ExactIntegrator,
    RosenbrockIntegrator,
    ScipyIntegrator,
    SplitIntegrator,
    compile_scenario,
)
from barrierflow.engine.split import linear_part  # noqa: E402
from barrierflow.units import unit_factor  # noqa: E402

H = 3600.0
CUMULATIVE = ("permeated:", "eliminated:", "degraded:", "removed:", "dosed:", "sampled:", "lost:")
TOL_PEAK = 1e-5
TOL_FINAL = 1e-6
MARGIN = 10.0
"""A column beyond the contract by at most this factor, every state within 1e-4 of its scale (the
time integration's promise in DEVELOPERS.md, Reliability) is ``marginal``: the product's
tolerances (rtol 3e-6) do not hold every column to 1e-6; beyond it, ``wrong``."""


class _Timeout(Exception):
    pass


def _alarm(signum, frame):
    raise _Timeout()


def _log(rng, lo, hi):
    return math.exp(rng.uniform(math.log(lo), math.log(hi)))


# ------------------------------------------------------------------ scenarios
def random_kind(seed: int) -> Scenario:
    rng = random.Random(seed)
    flavour = seed % 4
    if flavour == 0:
        return random_networks.random_scenario(rng, small_grid=True)
    if flavour == 1:
        return random_networks.random_scenario(rng, max_comp=4, small_grid=True, default_grid=True,
                                               max_barriers=2, min_barriers=1, linear=False)
    if flavour == 2:
        return random_networks.random_scenario(rng, max_comp=4, default_grid=True, max_barriers=2)
    return random_networks.random_scenario(rng, max_comp=5, small_grid=True, linear=False)


def extreme_kind(seed: int) -> tuple[Scenario, list[str]]:
    """The benchmark's shape (patch, skin of three layers, central, peripheral) with 1-4 extreme changes."""
    rng = random.Random(10_000_019 * seed + 7)
    layers = [dict(thickness=15e-4, diffusivity=1e-9 * H, partition=10.0),
              dict(thickness=100e-4, diffusivity=1e-6 * H, partition=1.0),
              dict(thickness=1000e-4, diffusivity=1e-6 * H, partition=1.0)]
    patch = dict(volume=1.0, initial_concentration=10.0)
    central = dict(volume=5000.0, clearance=10000.0)
    peripheral = dict(volume=20000.0)
    doses: list[Dose] = []
    exchanges = [Exchange("x", "central", "peripheral", 5000.0)]
    transfers: list[Transfer] = []
    extra_barriers: list[Barrier] = []
    extra_comps: list[Compartment] = []
    duration = rng.choice((24.0, 72.0, 168.0))
    output: dict = {"output_step": rng.choice((duration / 50, duration / 200, 1.0 / 6))}
    notes = []
    for _ in range(rng.randint(1, 4)):
        what = rng.choice(("partition", "diffusivity", "thickness", "degradation", "clearance", "volume",
                           "saturable", "repeat", "removal", "washoff", "infusion", "near_events", "many_layers",
                           "mixed", "cells"))
        i = rng.randrange(len(layers))
        if what == "partition":
            layers[i]["partition"] = _log(rng, 1e-4, 1e4)
            notes.append(f"layer {i} K={layers[i]['partition']:.3g}")
        elif what == "diffusivity":
            layers[i]["diffusivity"] = _log(rng, 1e-12, 1e-3) * H
            notes.append(f"layer {i} D={layers[i]['diffusivity'] / H:.3g} cm2/s")
        elif what == "thickness":
            layers[i]["thickness"] = _log(rng, 1e-5, 1.0)
            notes.append(f"layer {i} L={layers[i]['thickness']:.3g} cm")
        elif what == "degradation":
            layers[i]["degradation_rate"] = _log(rng, 1.0, 1e4)
            notes.append(f"layer {i} k={layers[i]['degradation_rate']:.3g}/h")
        elif what == "clearance":
            central["clearance"] = _log(rng, 1e-3, 1e7) if rng.random() < 0.5 else 0.0
            notes.append(f"CL={central['clearance']:.3g} mL/h")
        elif what == "volume":
            which = rng.choice((patch, central, peripheral))
            which["volume"] = _log(rng, 1e-6, 1e-3) if rng.random() < 0.5 else _log(rng, 1e6, 1e8)
            notes.append(f"volume {which['volume']:.3g}")
        elif what == "saturable":
            central["vmax"] = _log(rng, 1e-4, 10.0)
            central["km"] = _log(rng, 1e-8, 1e3)
            notes.append(f"vmax={central['vmax']:.3g} km={central['km']:.3g}")
        elif what == "repeat":
            every = duration / rng.randint(2, 7)
            doses.append(Dose("patch", "replace", at=every, every=every, concentration=_log(rng, 0.1, 100.0)))
            notes.append(f"replace every {every:.3g} h")
        elif what == "removal":
            at = rng.uniform(0.05, 0.9) * duration
            doses.append(Dose("patch", "remove", at=at, ends_contact=rng.random() < 0.5))
            notes.append(f"remove at {at:.3g}")
        elif what == "washoff":
            at = rng.uniform(0.05, 0.9) * duration
            doses.append(Dose("patch", "remove", at=at, fraction=rng.uniform(0.5, 0.999)))
            notes.append(f"wash-off at {at:.3g}")
        elif what == "infusion":
            at = rng.uniform(0.0, 0.8) * duration
            doses.append(Dose("central", "infusion", at=at, rate=_log(rng, 1e-3, 1e3),
                              duration=_log(rng, 0.01, duration)))
            notes.append(f"infusion at {at:.3g}")
        elif what == "near_events":
            at = rng.uniform(0.1, 0.8) * duration
            doses.append(Dose("central", "bolus", at=at, amount=_log(rng, 1e-3, 100.0)))
            eps = [1e-12, 1e-10, 1e-8, 1e-6, 1e-4, 1e-2]
            times = sorted({0.0, duration, at, *(at + s * e * duration for e in eps for s in (-1, 1)),
                            *np.linspace(0, duration, 11)[1:-1].tolist()})
            output = {"output_times": tuple(times)}
            notes.append(f"output times near {at:.3g}")
        elif what == "many_layers":
            n = rng.randint(5, 10)
            layers = [dict(thickness=_log(rng, 1e-4, 1e-1), diffusivity=_log(rng, 1e-10, 1e-5) * H,
                           partition=_log(rng, 0.01, 100.0)) for _ in range(n)]
            notes.append(f"{n} layers")
        elif what == "mixed" and not extra_comps:
            extra_comps.append(Compartment("depot", volume=_log(rng, 0.1, 100.0),
                                           initial_concentration=_log(rng, 1e-3, 10.0)))
            extra_barriers.append(Barrier("wall", "depot", "central", _log(rng, 0.1, 100.0),
                                          (Layer(_log(rng, 1e-4, 0.1), _log(rng, 1e-10, 1e-5) * H,
                                                 partition=_log(rng, 0.1, 10.0)),),
                                          model="steady"))
            transfers.append(Transfer("t", "peripheral", "depot", _log(rng, 1e-3, 1.0)))
            notes.append("steady barrier + transfer")
        elif what == "cells":
            layers[i]["cells"] = rng.choice((1, 2, 3, 200))
            notes.append(f"layer {i} {layers[i]['cells']} cells")
    skin = Barrier("skin", "patch", "central", 10.0, tuple(Layer(**lay) for lay in layers))
    s = Scenario(name="adversarial patch to body (invented)", duration=duration, check_ranges=False,
                 compartments=(Compartment("patch", **patch), Compartment("central", **central),
                               Compartment("peripheral", **peripheral), *extra_comps),
                 barriers=(skin, *extra_barriers), exchanges=tuple(exchanges), transfers=tuple(transfers),
                 doses=tuple(doses), **output)
    return s, notes


# ------------------------------------------------------------------ comparison
FLOOR = 1e-4
"""A column's scale is the larger of its largest magnitude in the reference and FLOOR times what
the whole run's largest amount (``Mbig``: initial, dosed, held supply, the mass balance's
yardstick) would be in that column (Mbig / V for a concentration, Mbig / area for a permeated
amount, Mbig / (area duration) for a flux): so the contract's 1e-5 / 1e-6 never asks a column that
stays near zero for less than 1e-9 to 1e-10 of the run's largest amount, below the product's own
absolute tolerance (3e-9 of each state's scale)."""


def column_floors(res: bf.Result) -> dict[str, float]:
    """The floor of each exported column's scale (see :data:`FLOOR`), in the column's units."""
    s = res.scenario
    u = s.output_units
    mm = s.substance.molar_mass
    ft = unit_factor("time", u.time)
    fc = unit_factor("concentration", u.concentration, mm)
    fa = unit_factor("amount", u.amount, mm)
    farea = unit_factor("area", u.area)
    mb = res.mass_balance
    big = max(abs(mb.initial), abs(mb.dosed), abs(mb.held_supply), abs(mb.removed), 1e-300)
    model = res.trajectory.model
    out = {}
    for c in s.compartments:
        v = c.volume
        out[f"conc:{c.id}"] = FLOOR * (big / v if v else float(model.scale[model.comp_index[c.id]])) * fc
    for b in s.barriers:
        out[f"permeated:{b.id}"] = FLOOR * big / b.area * fa / farea
        out[f"flux:{b.id}"] = FLOOR * big / b.area / s.duration * fa / farea / ft
    out["amount"] = FLOOR * big * fa
    return out


def column_errors(res: bf.Result, ref: bf.Result) -> tuple[float, str]:
    """Largest error of the exported columns over each column's scale, as a multiple of its
    tolerance (1 = at the contract's limit); and the worst column's name."""
    a, b = res.columns(), ref.columns()
    floors = column_floors(ref)
    worst, worst_name = 0.0, ""
    for (name, va), (_n, vb) in zip(a, b, strict=True):
        if name.startswith("time"):
            continue
        if np.all(np.isnan(vb)) and np.all(np.isnan(va)):
            continue
        if np.any(np.isnan(va) != np.isnan(vb)):
            return math.inf, name + " (NaN)"
        key = name.split(" [")[0]
        floor = floors.get(key, floors["amount"]) if not name.startswith("volume:") else 0.0
        scale = max(float(np.nanmax(np.abs(vb), initial=0.0)), floor, 1e-300)
        tol = TOL_FINAL if name.startswith(CUMULATIVE) else TOL_PEAK
        e = float(np.nanmax(np.abs(va - vb), initial=0.0)) / scale / tol
        if e > worst:
            worst, worst_name = e, name
    return worst, worst_name


def ledger_error(res: bf.Result, ref: bf.Result) -> float:
    """The reported mass balance against the reference's, over the largest amount of either."""
    a, b = res.mass_balance, ref.mass_balance
    keys = ("initial", "dosed", "held_supply", "present", "eliminated", "degraded", "removed")
    big = max(max(abs(getattr(b, k)) for k in keys), 1e-300)
    return max(abs(getattr(a, k) - getattr(b, k)) for k in keys) / big


def judge(s: Scenario, run, ref: bf.Result) -> dict:
    """Run ``run()`` (returns a Result) and classify it against ``ref``."""
    try:
        res = run()
    except (bf.ScenarioError, bf.SolverError) as err:
        return {"outcome": "refused", "why": str(err)[:160]}
    if res.status != 0:
        return {"outcome": "refused", "why": res.message[:160]}
    tr = res.trajectory
    out = {"path": tr.integrator, "fallbacks": tr.stats.get("fallbacks", 0)}
    if tr.states.shape != ref.trajectory.states.shape:
        out.update(outcome="wrong", why=f"shape {tr.states.shape} vs {ref.trajectory.states.shape}")
        return out
    scale = tr.model.scale
    out["state_err"] = float(np.max(np.abs(tr.states - ref.trajectory.states) / scale, initial=0.0))
    out["col_err"], out["col"] = column_errors(res, ref)
    out["ledger_vs_ref"] = ledger_error(res, ref)
    out["mb_reported"] = res.mass_balance.relative_error
    if out["col_err"] <= 1.0 and out["mb_reported"] <= 1e-6:
        out["outcome"] = "accurate"
    elif out["col_err"] <= MARGIN and out["state_err"] <= 1e-4 and out["mb_reported"] <= 1e-6:
        out["outcome"] = "marginal"
    else:
        out["outcome"] = "wrong"
    return out


def paths_for(s: Scenario, grid) -> dict:
    model = compile_scenario(s, grid)
    paths = {"rodas": RosenbrockIntegrator()}
    if model.is_linear:
        for method in ("chain", "modes", "expm"):
            paths[method] = ExactIntegrator(method)
    elif linear_part(model) is not None:
        paths["split"] = SplitIntegrator()
    return paths


def evaluate(s: Scenario, limit: float, all_paths: bool = True) -> dict:
    out: dict = {}
    signal.signal(signal.SIGALRM, _alarm)
    signal.alarm(int(limit))
    try:
        t0 = time.perf_counter()
        try:
            default = bf.simulate(s)
        except (bf.ScenarioError, bf.SolverError) as err:
            default = err
        out["t_default"] = time.perf_counter() - t0
        grid = default.trajectory.grid if isinstance(default, bf.Result) else None
        try:
            ref = bf.simulate(s, integrator=ScipyIntegrator("Radau", rtol=1e-10, atol=1e-13), grid=grid,
                              fallback=False)
        except (bf.SolverError, bf.ScenarioError) as err:
            out["reference"] = f"no reference: {str(err)[:120]}"
            if isinstance(default, bf.Result):
                out["default"] = {"outcome": "unjudged", "path": default.integrator}
            else:
                out["default"] = {"outcome": "refused", "why": str(default)[:160]}
            return out
        out["default"] = judge(s, lambda: default if isinstance(default, bf.Result) else _raise(default), ref)
        if all_paths:
            for name, integ in paths_for(s, grid).items():
                out[name] = judge(s, lambda integ=integ: bf.simulate(s, integrator=integ, grid=grid,
                                                                     fallback=False), ref)
    except _Timeout:
        out["timeout"] = True
    except Exception:  # noqa: BLE001 -- an exception of any other type is a finding of its own
        out["crash"] = traceback.format_exc()[-600:]
    finally:
        signal.alarm(0)
    return out


GRID_FREE = ("conc:", "amount:", "permeated:", "eliminated:", "degraded:", "removed:", "dosed:")
REFINED_TOL = 1e-3
"""The default grid's promise (DEVELOPERS.md, Reliability, "Accuracy promised"): every compartment
and cumulative amount within 1e-3 of its scale against Radau on a grid three times finer."""


def evaluate_refined(s: Scenario, limit: float) -> dict:
    """The default (its own grid) against Radau on the default grid with every cell cut in three
    (``SplitGrid`` of tests/test_properties_refined.py): the grid-free columns, each over its scale,
    as a multiple of :data:`REFINED_TOL`."""
    from test_properties_refined import SplitGrid

    out: dict = {}
    signal.signal(signal.SIGALRM, _alarm)
    signal.alarm(int(limit))
    try:
        try:
            res = bf.simulate(s)
        except (bf.ScenarioError, bf.SolverError) as err:
            return {"default": {"outcome": "refused", "why": str(err)[:160]}}
        ref = bf.simulate(s, integrator=ScipyIntegrator("Radau", rtol=1e-10, atol=1e-13), grid=SplitGrid(split=3),
                          fallback=False)
        floors = column_floors(ref)
        worst, worst_name = 0.0, ""
        for (name, va), (_n, vb) in zip(res.columns(), ref.columns(), strict=True):
            if not name.startswith(GRID_FREE) or np.all(np.isnan(vb)):
                continue
            key = name.split(" [")[0]
            scale = max(float(np.nanmax(np.abs(vb))), floors.get(key, floors["amount"]), 1e-300)
            e = float(np.nanmax(np.abs(va - vb))) / scale / REFINED_TOL
            if e > worst:
                worst, worst_name = e, name
        out["default"] = {"path": res.integrator, "col_err": worst, "col": worst_name,
                          "cells": res.trajectory.model.n_cells, "outcome": "accurate" if worst <= 1.0 else "wrong",
                          "warnings": len(res.warnings())}
    except _Timeout:
        out["timeout"] = True
    except Exception:  # noqa: BLE001 -- an exception of any other type is a finding of its own
        out["crash"] = traceback.format_exc()[-600:]
    finally:
        signal.alarm(0)
    return out


def _raise(err):
    raise err


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--kind", choices=("random", "extreme"), default="random")
    p.add_argument("-n", type=int, default=100)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--limit", type=float, default=120.0, help="seconds per scenario (default 120)")
    p.add_argument("--default-only", action="store_true", help="only the default path against the reference")
    p.add_argument("--refined", action="store_true",
                   help="the default grid itself: against Radau on a grid three times finer (grid-free columns, 1e-3)")
    p.add_argument("--show", type=int, default=None, help="print the scenario of this seed and stop")
    args = p.parse_args(argv)

    def make(seed):
        if args.kind == "random":
            return random_kind(seed), []
        return extreme_kind(seed)

    if args.show is not None:
        s, notes = make(args.show)
        print("#", notes)
        print(s.to_toml())
        return 0
    table: dict[str, collections.Counter] = collections.defaultdict(collections.Counter)
    worst: dict[str, tuple[float, int]] = {}
    start = time.perf_counter()
    for seed in range(args.seed, args.seed + args.n):
        try:
            s, notes = make(seed)
        except (bf.ScenarioError, RuntimeError) as err:
            table["(scenario)"]["invalid"] += 1
            print(f"seed {seed}: invalid scenario: {str(err)[:120]}", flush=True)
            continue
        if args.refined and any(lay.cells is not None for b in s.barriers for lay in b.layers):
            continue  # a grid the user chose: the default grid's promise is not at stake
        out = evaluate_refined(s, args.limit) if args.refined else evaluate(s, args.limit, not args.default_only)
        if out.get("timeout") or out.get("crash"):
            table["(scenario)"]["timeout" if out.get("timeout") else "crash"] += 1
            print(f"seed {seed} {notes}: {'timeout' if out.get('timeout') else out['crash']}", flush=True)
            continue
        if "reference" in out:
            table["(scenario)"]["no reference"] += 1
        for path, r in out.items():
            if not isinstance(r, dict):
                continue
            label = path if path != "default" else f"default->{r.get('path', '-')}"
            table[label][r["outcome"]] += 1
            if "col_err" in r:
                e = max(r["col_err"], r.get("state_err", 0.0) / 10)  # states: the promise of 1e-4 of the scale
                if e > worst.get(label, (-1, 0))[0]:
                    worst[label] = (e, seed)
            notable = r["outcome"] not in ("accurate", "marginal", "refused")
            if notable or r.get("state_err", 0) > 1e-4 or r.get("ledger_vs_ref", 0) > 1e-5:
                brief = {k: (f"{v:.3g}" if isinstance(v, float) else v) for k, v in r.items()}
                print(f"seed {seed} {notes} {path}: {brief}", flush=True)
    print(f"\n{args.n} {args.kind} scenarios from seed {args.seed} in {time.perf_counter() - start:.0f} s")
    for label in sorted(table):
        w = worst.get(label)
        tail = f"; worst {w[0]:.3g} x tolerance (seed {w[1]})" if w else ""
        print(f"  {label:22s} {dict(table[label])}{tail}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
