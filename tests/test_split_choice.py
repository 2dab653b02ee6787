"""The default's choice between the split path and RODAS4 on networks with saturable elimination,
and the split's step budget: on clear cases, the path taken (not timed; the times are
tests/benchmarks/saturable_sweep.py's) and the result against scipy's Radau integrator (Hairer and
Wanner, Solving Ordinary Differential Equations II, 2nd ed., 1996, sec. IV.8;
``scipy.integrate.Radau``, the reference) at rtol 1e-10, each state's largest deviation over its
magnitude scale within ``SPLIT_TOL`` as in tests/test_split_random.py.

The networks are the benchmark's patch (scenarios/benchmark_patch.toml, an invented scenario) at 10
cells a layer with saturable elimination on central: a mild one (km 100 times central's
concentration scale, the elimination nearly linear) and a sharp one (km 1e-7 of the scale, the
elimination's rate below km 4e5 /h: central's concentration hovers about km, and the split's step
check holds each step short, 40,116 steps against RODAS4's 647 at the last measurement), and the
sharp elimination of tests/test_split_random.py (3,672 steps against 74).
"""

from __future__ import annotations

import dataclasses
import random
from pathlib import Path

import pytest
from random_networks import random_scenario
from test_split_random import SPLIT_TOL, radau, scaled_error, sharp_elimination

import barrierflow as bf
from barrierflow.engine import AutoIntegrator, SplitIntegrator, compile_scenario, solve
from barrierflow.engine.integrators import SPLIT_BY_DEFAULT, estimated_seconds, sharpness, split_budget
from barrierflow.engine.split import BUDGET_START

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"

pytestmark = pytest.mark.skipif(not SPLIT_BY_DEFAULT, reason="the default never takes the split path")


def patch(km_share: float, strength: float) -> bf.Scenario:
    """The benchmark's patch at 10 cells a layer with saturable elimination on central: km
    ``km_share`` times central's concentration scale, vmax such that at c = km it removes
    ``strength`` times what the clearance removes at that scale."""
    s = bf.load(SCENARIOS / "benchmark_patch.toml")
    s = dataclasses.replace(s, barriers=tuple(
        dataclasses.replace(b, layers=tuple(dataclasses.replace(layer, cells=10) for layer in b.layers))
        for b in s.barriers))
    m = compile_scenario(s)
    c_scale = float(m.scale[m.comp_index["central"]])
    central = next(c for c in s.compartments if c.id == "central")
    vmax = 2.0 * strength * central.clearance * c_scale
    comps = tuple(dataclasses.replace(c, vmax=vmax, km=km_share * c_scale) if c.id == "central" else c
                  for c in s.compartments)
    return dataclasses.replace(s, compartments=comps)


def chosen(s: bf.Scenario):
    tr = solve(s, fallback=False)
    assert tr.status == 0, tr.message
    return tr


def test_mild_elimination_takes_the_split_and_matches_radau():
    # km 100 times the scale: the split took 104 steps against RODAS4's 706, 0.47 of its time
    s = patch(1e2, 1.0)
    tr = chosen(s)
    assert tr.integrator == "split" and tr.message == "the run finished", tr.message
    assert scaled_error(tr, radau(s)) < SPLIT_TOL


def test_sharp_elimination_goes_to_rodas4_by_the_estimate():
    # km 1e-7 of the scale: the elimination's rate below km times a day is about 1e7; the
    # estimate knows it and the default runs RODAS4 (before: the split, 25 times slower)
    s = patch(1e-7, 0.01)
    m = compile_scenario(s)
    assert sharpness(m, 24.0) > 1e6
    assert estimated_seconds("split", m, 1009, 7, 24.0) > estimated_seconds("rodas", m, 1009, 7)
    assert AutoIntegrator().resolve(m, 24.0, 1009, 7).name == "rodas4"
    tr = chosen(s)
    assert tr.integrator == "rodas4"
    assert scaled_error(tr, radau(s)) < SPLIT_TOL


def test_an_elimination_beside_a_far_faster_clearance_is_not_sharp():
    # network 72 of the property tests' generator (as test_split_random.split_networks draws
    # them): vmax / (km V) 8.9e3 /h in a 31 uL compartment whose clearance empties it at 2.6e6 /h,
    # far above the split's cut: it follows the slow modes at once, and the elimination removes
    # 0.3 % of its inflow below km. The split took 8 steps against RODAS4's 168 (0.65 of its time),
    # where the rate alone made its estimate 1,400 times RODAS4's and the default ran RODAS4
    s = random_scenario(random.Random(72), max_comp=4, small_grid=True, default_grid=True, max_barriers=2,
                        min_barriers=1, linear=False)
    m = compile_scenario(s)
    ic = int(m.mm_state[0])
    rate = float(m.mm_vmax[0] / (m.mm_km[0] * m.capacity[ic]))
    assert m.loss_rate[ic] > 100.0 * rate
    assert sharpness(m, 1.0) < 0.01 * rate
    # a clearance far below the cut leaves the rate as it is, though it is the larger: the
    # compartment's own dynamics carry the elimination's kink. The benchmark's saturable variant,
    # vmax / (km V) 1 /h beside central's clearance of 2 /h (with the share alone, extreme patch
    # 339 of the adversarial sweep, 0.85 /h beside 2 /h, went to the split, 4.6 times slower)
    s = bf.load(SCENARIOS / "benchmark_patch.toml")
    s = dataclasses.replace(s, compartments=tuple(dataclasses.replace(c, vmax=0.1, km=2e-5) if c.id == "central"
                                                  else c for c in s.compartments))
    slow = compile_scenario(s)
    c = int(slow.mm_state[0])
    rate = float(slow.mm_vmax[0] / (slow.mm_km[0] * slow.capacity[c]))
    assert slow.loss_rate[c] > rate
    assert sharpness(slow, 24.0) > 0.98 * 24.0 * rate
    tr = chosen(s)
    assert tr.integrator == "split" and tr.message == "the run finished", tr.message
    assert scaled_error(tr, radau(s)) < SPLIT_TOL


def test_the_step_budget_sends_a_slow_split_to_rodas4():
    # the sharp elimination of tests/test_split_random.py: with no budget the split itself,
    # thousands of steps; with the budget the default would give it, RODAS4 after a share of it
    s = sharp_elimination()
    m = compile_scenario(s)
    free = solve(s, SplitIntegrator(), fallback=False)
    assert free.message == "the run finished"
    assert free.stats["steps"] + free.stats["rejected_steps"] > 4 * split_budget(3)
    tr = solve(s, SplitIntegrator(step_budget=split_budget(3)), fallback=False)
    assert tr.status == 0
    assert "computed on rodas4" in tr.message and "budget" in tr.message, tr.message
    # it gave up early: after at most the budget's share at the start and its share of the time
    spent = int(tr.message.split("after ")[-1].split(" steps")[0])
    assert spent <= split_budget(3) + 1
    assert spent >= BUDGET_START * split_budget(3)
    assert scaled_error(tr, radau(s)) < SPLIT_TOL
    # and a budget it stays within changes nothing
    wide = solve(s, SplitIntegrator(step_budget=10 * free.stats["steps"] + 10 * free.stats["rejected_steps"]),
                 fallback=False)
    assert wide.message == "the run finished" and (wide.states == free.states).all()
    assert m.n_state == wide.states.shape[1]


def test_step_budget_is_checked():
    with pytest.raises(bf.ScenarioError, match="step_budget"):
        SplitIntegrator(step_budget=0)
    with pytest.raises(bf.ScenarioError, match="step_budget"):
        SplitIntegrator(step_budget=True)
