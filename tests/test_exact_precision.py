"""The exact paths (chain, modes, matrix exponential) against scipy's Radau: regression cases of
wrong results they once returned with exit 0 (cases of the adversarial sweep,
tests/benchmarks/adversarial_sweep.py), each reduced to an invented scenario.

Reference: scipy's Radau IIA at rtol 1e-10, atol 1e-13 of each state's scale on the same grid
(Hairer and Wanner, Solving Ordinary Differential Equations II, 2nd ed., 1996, sec. IV.8). Measure:
the accuracy contract of /work/shared/spec/benchmark.md (a concentration within 1e-5 of its peak,
a cumulative amount within 1e-6 of its final value), each column over its own largest value.
"""

from __future__ import annotations

import numpy as np

import barrierflow as bf
from barrierflow import Barrier, Compartment, Layer, Scenario, Transfer
from barrierflow.engine import ScipyIntegrator
from barrierflow.engine.exact import ExactIntegrator

H = 3600.0  # s per h
CUMULATIVE = ("permeated:", "eliminated:", "degraded:", "removed:", "dosed:")


def radau(s: Scenario, grid=None) -> bf.Result:
    return bf.simulate(s, integrator=ScipyIntegrator("Radau", rtol=1e-10, atol=1e-13), grid=grid, fallback=False)


def contract_error(res: bf.Result, ref: bf.Result, floor: float = 0.0) -> tuple[float, str]:
    """Largest error of the exported columns as a multiple of the contract's tolerance (1e-5 of a
    column's peak, 1e-6 of a cumulative amount's final value), each column's scale at least
    ``floor`` times its kind's tolerance-free yardstick (the run's largest amount, in mg)."""
    worst, name = 0.0, ""
    for (key, a), (_k, b) in zip(res.columns(), ref.columns(), strict=True):
        if key.startswith(("time", "volume:")) or np.all(np.isnan(b)):
            continue
        scale = max(float(np.nanmax(np.abs(b))), floor, 1e-300)
        tol = 1e-6 if key.startswith(CUMULATIVE) else 1e-5
        e = float(np.nanmax(np.abs(a - b))) / scale / tol
        if e > worst:
            worst, name = e, key
    return worst, name


def test_a_compartment_filled_only_by_a_transfer_fills_on_the_matrix_exponential_path():
    # random case 1812 of the sweep: the expm path kept a state that only a one-way transfer
    # fills at its start value (it counted the transfer's source as acted on, not its receiver):
    # the receiver's concentration stayed 0, 625 times the contract off Radau, exit 0
    s = Scenario(name="a receiver filled by a transfer alone (invented)", duration=2.5, output_step=0.25,
                 compartments=(Compartment("donor", volume=0.43, initial_concentration=1.0),
                               Compartment("receiver", volume=14.5),
                               Compartment("body", volume=68.0, clearance=0.034)),
                 barriers=(Barrier("wall", "donor", "body", 0.51,
                                   (Layer(2.2e-4, 1.6e-5, partition=83.0, cells=6),
                                    Layer(28e-4, 1.2e-6, partition=0.071, cells=8))),),
                 transfers=(Transfer("t", "donor", "receiver", 0.0167),))
    ref = radau(s)
    for method in ("expm", "auto"):
        res = bf.simulate(s, integrator=ExactIntegrator(method), fallback=False)
        assert res.status == 0
        err, col = contract_error(res, ref)
        assert err <= 1.0, (method, col, err)
    final = dict(ref.columns())["conc:receiver [mg/L]"][-1]
    assert final > 1e-3  # the receiver does fill: 2.5 h of 0.0167/h of the donor's share
