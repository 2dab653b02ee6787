"""The compiled kernels against their interpreted twins and against numerical differentiation."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np

import barrierflow as bf
from barrierflow.engine import compile_scenario
from barrierflow.engine.problem import IntervalProblem, IntervalSettings

ROOT = Path(__file__).resolve().parents[1]

SMALL = """
[scenario]
name = "kernel check (invented)"
duration = "6 h"
output_step = "1 h"

[[compartment]]
id = "donor"
volume = "1 mL"
initial_concentration = "5 mg/mL"

[[compartment]]
id = "plasma"
volume = "2 L"
clearance = "1 L/h"
vmax = "0.5 mg/h"
km = "0.001 mg/mL"

[[compartment]]
id = "gut"
volume = "50 mL"

[[barrier]]
id = "skin"
from = "donor"
to = "plasma"
area = "3 cm^2"
  [[barrier.layer]]
  thickness = "10 um"
  diffusivity = "1e-8 cm^2/s"
  partition = 4
  cells = 5
  degradation_rate = "0.1 1/h"
  [[barrier.layer]]
  thickness = "50 um"
  diffusivity = "1e-6 cm^2/s"
  cells = 4

[[transfer]]
from = "gut"
to = "plasma"
rate = "0.5 1/h"

[[dose]]
target = "gut"
kind = "bolus"
amount = "3 mg"
at = "1 h"
"""


def test_jacobian_matches_finite_differences():
    # Reference: a central finite-difference Jacobian of the rate kernel (common practice).
    model = compile_scenario(bf.loads(SMALL))
    rng = np.random.default_rng(1)
    y = rng.uniform(0.0, 1.0, model.n_state) * model.scale
    for clamp in (np.zeros(model.n_comp, bool), np.array([True, False, False])):
        prob = IntervalProblem(model, IntervalSettings(np.array([0.0, 0.2, 0.0]), clamp))
        jac = prob.jac(0.0, y).toarray()
        fd = np.empty_like(jac)
        for k in range(model.n_state):
            h = 1e-6 * max(abs(y[k]), model.scale[k])
            yp, ym = y.copy(), y.copy()
            yp[k] += h
            ym[k] -= h
            fd[:, k] = (prob.fun(0, yp) - prob.fun(0, ym)) / (2 * h)
        assert np.allclose(jac, fd, rtol=1e-5, atol=1e-8 * np.abs(fd).max())


def test_kernels_without_jit_give_the_same_run(tmp_path):
    # The same scenario run with NUMBA_DISABLE_JIT=1 (the kernels as plain Python) in another process.
    code = (
        "import json, sys, barrierflow as bf\n"
        f"r = bf.simulate(bf.loads({SMALL!r}))\n"
        "print(json.dumps([list(r.concentration('plasma')), list(r.permeated('skin'))]))\n"
    )
    env = dict(os.environ, NUMBA_DISABLE_JIT="1")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True, cwd=ROOT)
    plain = json.loads(out.stdout)
    r = bf.simulate(bf.loads(SMALL))
    assert np.allclose(plain[0], r.concentration("plasma"), rtol=1e-9, atol=1e-15)
    assert np.allclose(plain[1], r.permeated("skin"), rtol=1e-9, atol=1e-15)


def test_rates_conserve_mass_without_losses():
    # With no elimination, degradation or clamps, the amount rates sum to zero (conservation).
    text = SMALL.replace('clearance = "1 L/h"\nvmax = "0.5 mg/h"\nkm = "0.001 mg/mL"\n', "").replace(
        '  degradation_rate = "0.1 1/h"\n', "")
    model = compile_scenario(bf.loads(text))
    prob = IntervalProblem(model, IntervalSettings(np.zeros(3), np.zeros(3, bool)))
    y = np.linspace(0.1, 1.0, model.n_state)
    dy = prob.fun(0.0, y)
    total = float(dy[: model.n_dyn] @ model.capacity)
    assert abs(total) < 1e-12 * float(np.abs(dy[: model.n_dyn] * model.capacity).sum())
