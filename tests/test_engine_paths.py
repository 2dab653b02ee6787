"""Every engine path against the same references: the compiled RODAS4 integrator, the exact
solutions (compiled chain, eigenmodes, matrix exponentials), the scipy integrators, the
populations; and every compiled kernel against a NumPy/scipy version or its own pure-Python run
(``NUMBA_DISABLE_JIT=1``).

The physics references (published closed forms, each with its source) live in
``test_engine_reference.py``; here each of its cases runs again on each path. The other checks
compare with independent references named beside them: scipy's Radau integrator (Hairer and
Wanner, Solving ODEs II, 1996, sec. IV.8), scipy.linalg.expm (Al-Mohy and Higham, SIAM J.
Matrix Anal. Appl. 31, 2009), numpy.linalg.solve (LAPACK gesv) and numpy.linalg.eigh (LAPACK
syevd). Errors are scaled as atol + rtol |y| (scipy's convention).
"""

from __future__ import annotations

import functools
import importlib
import inspect
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import test_engine_reference as ref_cases
from numba import njit
from scipy.integrate import solve_ivp

import barrierflow as bf
from barrierflow import Barrier, Compartment, Dose, Exchange, Layer, Scenario, ScenarioError, SolverError, Transfer
from barrierflow.analysis.metrics import compute_metrics
from barrierflow.analysis.population import percentile_bands, population_exposure
from barrierflow.engine import ScipyIntegrator, arrays, compile_scenario, exact_chain, solve
from barrierflow.engine.exact import ExactIntegrator, exact_supported
from barrierflow.engine.exact_chain import chain_order
from barrierflow.engine.integrators import SPLIT_BY_DEFAULT
from barrierflow.engine.kernels import jacobian_coo, jacobian_size, rates
from barrierflow.engine.population import sample_scenarios, simulate_many, simulate_population
from barrierflow.engine.problem import IntervalProblem, IntervalSettings
from barrierflow.engine.rosenbrock import RosenbrockIntegrator, _factor, _scatter, _solve, _workspace, build_structure
from barrierflow.engine.split import SplitIntegrator, linear_part
from barrierflow.model.paths import ParamPath, parameter_paths

H = 3600.0
engine_solve = importlib.import_module("barrierflow.engine.solve")  # the module (the package exports a function)

PATHS = {
    "rodas": RosenbrockIntegrator(),
    "exact-chain": ExactIntegrator("chain"),
    "exact-modes": ExactIntegrator("modes"),
    "exact-expm": ExactIntegrator("expm"),
    "bdf": ScipyIntegrator("BDF"),
    "split": SplitIntegrator(),
}


def _reference_cases():
    cases = []
    for name, fn in inspect.getmembers(ref_cases, inspect.isfunction):
        if not name.startswith("test_"):
            continue
        marks = [m for m in getattr(fn, "pytestmark", []) if m.name == "parametrize"]
        if not marks:
            cases.append(pytest.param(fn, {}, id=name[5:]))
            continue
        names = [a.strip() for a in marks[0].args[0].split(",")]
        for values in marks[0].args[1]:
            values = values if isinstance(values, tuple) else (values,)
            cases.append(pytest.param(fn, dict(zip(names, values, strict=True)), id=f"{name[5:]}-{values}"))
    return cases


@pytest.mark.parametrize("path", list(PATHS))
@pytest.mark.parametrize("case,kwargs", _reference_cases())
def test_reference_case_on_every_path(case, kwargs, path, monkeypatch):
    # Each reference of test_engine_reference.py (its sources are named there), with the
    # engine's default integrator replaced by this path.
    integrator = PATHS[path]
    original = engine_solve.resolve_integrator

    def pick(given, model, longest=None, rows=None, intervals=None, shortest=None, times=None, marks=None):
        if given is not None:
            return original(given, model, longest, rows, intervals, shortest, times, marks)
        if isinstance(integrator, ExactIntegrator):
            if not model.is_linear:
                pytest.skip("exact paths need a linear model")
            if integrator.method == "chain" and chain_order(model) is None:
                pytest.skip("not a chain network")
            if integrator.method == "modes" and len(model.tr_from):
                pytest.skip("eigenmodes need a symmetric network (no transfers)")
            if integrator.method == "expm" and not len(model.tr_from):
                # matrix exponentials are the exact path of networks with transfers; on very stiff
                # networks over long steps their rounding reaches ~1e-9 (scaling and squaring), which
                # the symmetric paths avoid; test_exact_paths_agree_with_radau covers them there
                pytest.skip("matrix exponentials are the exact path of networks with transfers")
        if isinstance(integrator, SplitIntegrator) and linear_part(model) is None:
            pytest.skip("the split needs a chain network with saturable elimination in one compartment")
        return integrator

    monkeypatch.setattr(engine_solve, "resolve_integrator", pick)
    case(**kwargs)


# ---------------------------------------------------------------- networks for cross-checks
def patch_body(cells=6, saturable=False, extra_doses=(), hold=False):
    """An invented patch-to-body network (the benchmark's shape, few cells)."""
    layers = (Layer(15e-4, 1e-9 * H, partition=10.0, cells=cells), Layer(100e-4, 1e-6 * H, cells=cells),
              Layer(1000e-4, 1e-6 * H, cells=cells))
    central = Compartment("central", volume=5000.0, clearance=10000.0,
                          **({"vmax": 0.1, "km": 2e-5} if saturable else {}))
    doses = [Dose("patch", "replace", at=24.0, every=24.0, count=2, concentration=10.0), *extra_doses]
    if hold:
        doses.append(Dose("patch", "hold", at=6.0, duration=5.0, concentration=3.0))
    return Scenario(name="patch to body (invented)", duration=72.0, output_step=0.5,
                    compartments=(Compartment("patch", volume=1.0, initial_concentration=10.0), central,
                                  Compartment("peripheral", volume=20000.0)),
                    barriers=(Barrier("skin", "patch", "central", 10.0, layers),),
                    exchanges=(Exchange("blood", "central", "peripheral", flow=5000.0),),
                    doses=tuple(doses))


def two_barriers():
    """An invented donor feeding two receptors through two membranes (not a chain: donor has 2 links)."""
    lay = (Layer(30e-4, 5e-8 * H, partition=3.0, cells=5),)
    lay2 = (Layer(50e-4, 2e-7 * H, partition=0.5, cells=4), Layer(10e-4, 1e-7 * H, partition=2.0, cells=3))
    return Scenario(name="two membranes (invented)", duration=30.0, output_step=0.5,
                    compartments=(Compartment("donor", volume=2.0, initial_concentration=5.0),
                                  Compartment("left", volume=3.0, clearance=0.2), Compartment("right", volume=1.0)),
                    barriers=(Barrier("a", "donor", "left", 1.0, lay), Barrier("b", "donor", "right", 0.5, lay2)),
                    doses=(Dose("donor", "infusion", at=3.0, rate=0.5, duration=6.0),
                           Dose("left", "bolus", at=10.0, amount=0.3)))


def patch_star(n_patches=5):
    """An invented star: patches of different sizes, each through its own barrier into one central
    compartment (listed first, so that the RODAS4 block solver eliminates its compartments in
    another order than they are listed), which exchanges with a peripheral one and takes a
    one-way transfer back from it."""
    out = [Compartment("central", volume=5000.0, clearance=10000.0), Compartment("peripheral", volume=20000.0)]
    bars = []
    for i in range(n_patches):
        out.append(Compartment(f"patch{i}", volume=1.0 + i, initial_concentration=10.0 / (1 + i)))
        lay = (Layer((15 + 5 * i) * 1e-4, 1e-9 * H, partition=10.0, cells=3 + i), Layer(100e-4, 1e-6 * H, cells=4))
        bars.append(Barrier(f"skin{i}", f"patch{i}", "central", 1.0 + 0.5 * i, lay))
    return Scenario(name="star of patches (invented)", duration=24.0, output_step=1.0, compartments=tuple(out),
                    barriers=tuple(bars), exchanges=(Exchange("blood", "central", "peripheral", flow=5000.0),),
                    transfers=(Transfer("return", "peripheral", "central", rate=0.1),))


def closed_cell():
    """An invented closed diffusion cell (no loss anywhere: the chain matrix is singular)."""
    lay = (Layer(20e-4, 1e-7 * H, partition=8.0, cells=6), Layer(80e-4, 1e-6 * H, partition=1.5, cells=6))
    return Scenario(name="closed cell (invented)", duration=50.0, output_step=1.0,
                    compartments=(Compartment("donor", volume=2.0, initial_concentration=5.0),
                                  Compartment("receiver", volume=3.0, partition=0.5)),
                    barriers=(Barrier("film", "donor", "receiver", 1.0, lay),),
                    doses=(Dose("receiver", "bolus", at=20.0, amount=1.0),))


def with_transfer():
    """An invented depot-and-skin network with a one-way transfer (not symmetric)."""
    lay = (Layer(20e-4, 1e-7 * H, partition=2.0, cells=5),)
    return Scenario(name="depot (invented)", duration=24.0, output_step=0.5,
                    compartments=(Compartment("patch", volume=1.0, initial_concentration=2.0),
                                  Compartment("depot", volume=50.0), Compartment("plasma", volume=5000.0,
                                                                                 clearance=1000.0)),
                    barriers=(Barrier("skin", "patch", "depot", 4.0, lay),),
                    transfers=(Transfer("absorption", "depot", "plasma", rate=0.7),))


def held_donor_degrading():
    """An invented held donor over a degrading two-layer film into a held sink."""
    lay = (Layer(30e-4, 2e-7 * H, partition=2.0, cells=6, degradation_rate=0.5),
           Layer(60e-4, 1e-6 * H, partition=1.0, cells=6))
    return Scenario(name="degrading film (invented)", duration=20.0, output_step=0.5,
                    compartments=(Compartment("donor", held_concentration=1.0),
                                  Compartment("sink", held_concentration=0.0)),
                    barriers=(Barrier("film", "donor", "sink", 1.0, lay),))


NETWORKS = {"patch-body": patch_body, "patch-body-hold": lambda: patch_body(hold=True),
            "two-barriers": two_barriers, "closed-cell": closed_cell, "transfer": with_transfer,
            "held-degrading": held_donor_degrading}


def radau(scenario):
    # independent reference integrator: scipy Radau (Hairer & Wanner 1996, IV.8), tight tolerances
    return solve(scenario, ScipyIntegrator("Radau", rtol=1e-11, atol=1e-14))


def scaled_error(a, b, model):
    """Largest |a - b| over all states and times, each state scaled by its magnitude scale."""
    return float(np.max(np.abs(a - b) / model.scale))


@pytest.mark.parametrize("net", list(NETWORKS))
def test_exact_paths_agree_with_radau(net):
    s = NETWORKS[net]()
    ref = radau(s)
    m = ref.model
    methods = ["expm", "auto"]
    if len(m.tr_from) == 0:
        methods.append("modes")
    if chain_order(m) is not None:
        methods.append("chain")
    for method in methods:
        tr = solve(s, ExactIntegrator(method), fallback=False)
        assert scaled_error(tr.states, ref.states, m) < 1e-8, method
        assert np.allclose(tr.event_dosed, ref.event_dosed, rtol=1e-12, atol=1e-12)
    # the exact paths agree with one another to rounding
    a = solve(s, ExactIntegrator("expm")).states
    for method in methods[1:]:
        assert scaled_error(solve(s, ExactIntegrator(method)).states, a, m) < 1e-10, method


@pytest.mark.parametrize("net", list(NETWORKS))
def test_rodas_agrees_with_radau(net):
    s = NETWORKS[net]()
    ref = radau(s)
    tr = solve(s, RosenbrockIntegrator(rtol=1e-8, atol=1e-11))
    assert scaled_error(tr.states, ref.states, ref.model) < 1e-7
    tr = solve(s, RosenbrockIntegrator())  # the default tolerances
    assert scaled_error(tr.states, ref.states, ref.model) < 1e-5


@pytest.mark.parametrize("rtol", [3e-6, 1e-12])
def test_rodas_mass_balance_closes_over_one_long_interval(rtol):
    # one dosing interval of 5000 h, thousands of steps: the ledger must close to round-off
    # (a conservation identity of the model, common practice for a mass-conserving scheme).
    # Rates carried from step to step through the stage equations let rounding build up here.
    s = patch_body(cells=30)
    s = Scenario(name=s.name, duration=5000.0, output_step=50.0, compartments=s.compartments, barriers=s.barriers,
                 exchanges=s.exchanges)
    r = bf.simulate(s, integrator=RosenbrockIntegrator(rtol=rtol, atol=rtol * 1e-3))
    assert r.stats["intervals"] == 1 and r.stats["steps"] > 100
    assert r.mass_balance.relative_error < 1e-12, r.mass_balance


def test_rodas_saturable_against_radau_and_converges():
    # nonlinear (Michaelis-Menten elimination); reference scipy Radau at rtol 1e-11
    s = patch_body(saturable=True)
    ref = radau(s)
    c = ref.model.comp_index["central"]
    peak = ref.states[:, c].max()
    errs = []
    for rtol in (1e-5, 1e-7, 1e-9):
        tr = solve(s, RosenbrockIntegrator(rtol=rtol, atol=rtol * 1e-3))
        errs.append(np.max(np.abs(tr.states[:, c] - ref.states[:, c])) / peak)
    assert errs[0] < 1e-4 and errs[2] < 1e-8
    assert errs[2] < errs[1] < errs[0]  # tighter tolerance, smaller error (order 4 method)


def test_rodas_saturable_held_and_infused_against_radau():
    # saturable elimination in a compartment that is held for a while (its elimination then comes
    # from its supply) and then receives an infusion; the stages of RODAS4 add the excess of the
    # saturable rate over its linearisation, here in both of its forms. Reference: scipy Radau at
    # rtol 1e-11 on the same grid; every state within 1e-6 of its scale, mass balance closed
    central = Compartment("central", volume=5000.0, clearance=10000.0, vmax=0.5, km=2e-5)
    layers = (Layer(15e-4, 1e-9 * H, partition=10.0, cells=5), Layer(100e-4, 1e-6 * H, cells=5))
    s = Scenario(name="saturable held body (invented)", duration=48.0, output_step=0.5,
                 compartments=(Compartment("patch", volume=1.0, initial_concentration=10.0), central),
                 barriers=(Barrier("skin", "patch", "central", 10.0, layers),),
                 doses=(Dose("central", "hold", at=6.0, duration=4.0, concentration=3e-5),
                        Dose("central", "infusion", at=20.0, rate=2.0, duration=8.0),
                        Dose("patch", "replace", at=24.0, concentration=10.0)))
    ref = radau(s)
    tr = solve(s, RosenbrockIntegrator(rtol=1e-8, atol=1e-11))
    err = np.max(np.abs(tr.states - ref.states) / tr.model.scale)
    assert err < 1e-6
    supply = tr.model.arrays.q_supply + tr.model.comp_index["central"]
    assert tr.states[-1, supply] > 0.0  # the hold supplied what the elimination took


def test_auto_choice():
    assert solve(patch_body()).integrator == "exact"
    # saturable elimination: the split path where its estimate is below RODAS4's, while
    # SPLIT_BY_DEFAULT is on (RODAS4 when it is off)
    assert solve(patch_body(saturable=True)).integrator == ("split" if SPLIT_BY_DEFAULT else "rodas4")
    assert solve(with_transfer()).integrator == "exact"  # small: matrix exponentials
    assert exact_supported(compile_scenario(two_barriers()))


def test_rodas_failure_is_reported():
    s = patch_body()
    with pytest.raises(SolverError, match="step limit"):
        solve(s, RosenbrockIntegrator(max_steps=3), fallback=False)
    tr = solve(s, RosenbrockIntegrator(max_steps=3), raise_on_failure=False, fallback=False)
    assert tr.status == -1 and len(tr.times) == len(tr.states) < 145
    assert "dosing interval 1" in tr.message


def test_integrator_options_are_checked():
    with pytest.raises(ScenarioError, match="integrator rtol: got 2; must be a number between 0 and 1"):
        RosenbrockIntegrator(rtol=2)
    # the controller grows a step at most 6 times: a larger hold froze the step (step limit)
    with pytest.raises(ScenarioError, match="integrator hold: got 6; must be a number from 1 to 2"):
        RosenbrockIntegrator(hold=6)
    assert solve(patch_body(), RosenbrockIntegrator(hold=2)).stats["steps"] < 2000
    with pytest.raises(ScenarioError, match="integrator method"):
        ExactIntegrator("magic")
    with pytest.raises(ScenarioError, match="needs a linear model"):
        solve(patch_body(saturable=True), ExactIntegrator())


# ---------------------------------------------------------------- kernels against numpy
# The engine's inner kernels carry no Python wrapper (compiled callers only); these entries call
# them from compiled code, as the engine does.
@njit
def _call_subject(stack, i):
    return arrays.subject(stack, i)


@njit
def _call_workspace(nc, nx, n, n_w, n_jac, n_be):
    return _workspace(nc, nx, n, n_w, n_jac, n_be)


@njit
def _call_scatter(rows, cols, vals, k, nc, nd, cell_be, be_comp, tri, jcc, jxc, jcx, qr, qc, qv):
    return _scatter(rows, cols, vals, k, nc, nd, cell_be, be_comp, tri, jcc, jxc, jcx, qr, qc, qv)


@njit
def _call_factor(fac, nc, tri, jcc, jxc, jcx, sargs, w, smat, perm):
    return _factor(fac, nc, tri, jcc, jxc, jcx, sargs, w, smat, perm)


@njit
def _call_build(order, clamp, m, idx, cmap, msq, tv, dd, ee, gedge, ediag, comp_of):
    return exact_chain._build(order, clamp, m, idx, cmap, msq, tv, dd, ee, gedge, ediag, comp_of)


@njit
def _call_slow_modes(dd, ee, n, cut, gedge, ediag, msq, comp_of, lam, vec):
    return exact_chain._slow_modes(dd, ee, n, cut, gedge, ediag, msq, comp_of, lam, vec)


@njit
def _call_solve(r, fac, nc, tri, jxc, jcx, sargs, w, smat, perm, qr, qc, qv, nq):
    _solve(r, fac, nc, tri, jxc, jcx, sargs, w, smat, perm, qr, qc, qv, nq)


def test_compiled_arrays_are_float_for_whole_number_inputs():
    # whole numbers from the Python API must not change the kernels' argument types (each new
    # type compiles every kernel again)
    s = Scenario(name="whole numbers (invented)", duration=10, output_step=1,
                 compartments=(Compartment("a", volume=2, initial_concentration=1), Compartment("b", volume=3)),
                 exchanges=(Exchange("x", "a", "b", flow=5),))
    m = compile_scenario(s)
    for name in ("capacity", "inv_partition", "link_a", "link_b", "link_c", "link_d", "loss_rate", "y0", "scale"):
        assert getattr(m, name).dtype == np.float64, name
    for name in ("link_p", "link_q", "link_loss", "link_track", "loss_to"):
        assert getattr(m, name).dtype == np.int64, name


def _rates_numpy(m, y, infusion, clamp):
    """The balances of the module docstring of barrierflow.engine.compiled, in NumPy, link by link
    (every link, including those the kernel sweeps as cell chains)."""
    nc, nd = m.n_comp, m.n_dyn
    u = y[:nd] * m.inv_partition
    p, q = m.link_p, m.link_q
    r_out = m.link_a * u[p] - m.link_b * u[q]
    r_in = m.link_c * u[p] - m.link_d * u[q]
    amount = np.zeros(len(y))  # amount rates, mg/h
    np.add.at(amount, p, -r_out)
    np.add.at(amount, q, r_in)
    lossy = m.link_loss >= 0
    np.add.at(amount, m.link_loss[lossy], (r_out - r_in)[lossy])
    tracked = m.link_track >= 0
    np.add.at(amount, m.link_track[tracked], r_in[tracked])
    first = m.loss_rate * m.capacity * y[:nd]
    amount[:nd] -= first
    np.add.at(amount, m.loss_to, first)
    c = y[m.mm_state]
    mm = m.mm_vmax * c / (m.mm_km + np.abs(c))
    np.add.at(amount, m.mm_state, -mm)
    np.add.at(amount, nd + m.mm_state, mm)
    tr = m.tr_rate * m.capacity[m.tr_from] * y[m.tr_from]
    np.add.at(amount, m.tr_from, -tr)
    np.add.at(amount, m.tr_to, tr)
    amount[:nc] += infusion
    amount[m.q_infused:m.q_infused + nc] += infusion
    amount[m.q_supply:m.q_supply + nc] += np.where(clamp, -amount[:nc], 0.0)
    amount[:nc] = np.where(clamp, 0.0, amount[:nc])
    amount[:nd] /= m.capacity
    return amount


def test_rate_kernel_against_numpy():
    # the one rate kernel of the engine against the balances written out in NumPy, every process
    # switched on
    s = patch_body(saturable=True)
    layers = (Layer(30e-4, 2e-7 * H, partition=2.0, degradation_rate=0.3),)
    s = Scenario(name="all processes (invented)", duration=5.0, output_step=1.0,
                 compartments=(*s.compartments, Compartment("gut", volume=10.0),
                               Compartment("bath", held_concentration=2.0)),
                 barriers=(*s.barriers, Barrier("film", "bath", "gut", 2.0, layers),
                           Barrier("quick", "gut", "central", 1.0, layers, model="steady")),
                 exchanges=s.exchanges, transfers=(Transfer("absorption", "gut", "central", rate=0.4),))
    m = compile_scenario(s)
    rng = np.random.default_rng(3)
    for _ in range(5):
        y = rng.random(m.n_state)
        infusion = rng.random(m.n_comp) * (rng.random(m.n_comp) > 0.5)
        clamp = m.held | (rng.random(m.n_comp) > 0.7)
        got = np.empty(m.n_state)
        rates(y, got, m.arrays, infusion, clamp)
        want = _rates_numpy(m, y, infusion, clamp)
        assert np.allclose(got, want, rtol=1e-13, atol=1e-13 * np.abs(want).max())


def test_a_population_subject_is_its_own_model():
    # stack_arrays then subject (the population's view of subject i) give back every field of
    # each subject's ModelArrays
    models = [compile_scenario(s) for s in sample_scenarios(patch_body(), {"compartment.central.clearance": 0.3,
                                                                           "barrier.skin.layer.2.diffusivity": 0.3},
                                                          3, seed=2)[0]]
    stack = arrays.stack_arrays([m.arrays for m in models])
    for i, m in enumerate(models):
        got = _call_subject(stack, i)
        for name in arrays.ModelArrays._fields:
            assert np.array_equal(getattr(got, name), getattr(m.arrays, name)), name


@pytest.mark.parametrize("net", ["patch-body", "two-barriers", "held-degrading", "star"])
def test_block_solver_equals_dense_solve(net):
    # the bordered tridiagonal solver against numpy.linalg.solve (LAPACK gesv) on M = fac I - J
    m = compile_scenario(patch_star() if net == "star" else NETWORKS[net]())
    st = build_structure(m)
    if net == "star":  # the hub (listed first) eliminated last, or last but one when it ties with
        # its last neighbour: no fill-in (minimum degree)
        assert st.comp_pos[m.comp_index["central"]] >= m.n_comp - 2
    n = m.n_state
    nj = jacobian_size(m)
    rng = np.random.default_rng(5)
    for clamp in (m.held.copy(), m.held | np.eye(m.n_comp, dtype=bool)[0]):
        ws = _call_workspace(m.n_comp, m.n_cells, n, st.n_w, nj, len(st.be_cell))
        rows, cols, vals, tri, jcc, jxc, jcx, qr, qc, qv, w, smat, perm = ws[:13]
        y = rng.random(n)
        k = jacobian_coo(y, rows, cols, vals, m.arrays, clamp)
        nq = _call_scatter(rows, cols, vals, k, m.n_comp, m.n_dyn, st.cell_be, st.be_comp, tri, jcc, jxc, jcx, qr, qc,
                           qv)
        dense = IntervalProblem(m, IntervalSettings(np.zeros(m.n_comp), clamp)).jac_dense(0.0, y)
        for fac in (1e-3, 1.0, 1e4):
            assert _call_factor(fac, m.n_comp, tri, jcc, jxc, jcx, st.args(), w, smat, perm)
            r = rng.standard_normal(n)
            x = r.copy()
            _call_solve(x, fac, m.n_comp, tri, jxc, jcx, st.args(), w, smat, perm, qr, qc, qv, nq)
            want = np.linalg.solve(fac * np.eye(n) - dense, r)
            assert np.allclose(x, want, rtol=1e-9, atol=1e-12 * np.abs(want).max())


def test_chain_modes_against_dense_eigh():
    # slow eigenpairs of the chain matrix against numpy.linalg.eigh (LAPACK syevd) of B built
    # from the Jacobian (an independent construction)
    from barrierflow.engine.exact import _jacobian

    m = compile_scenario(patch_body(cells=10))
    order = chain_order(m)
    nd, L = m.n_dyn, len(order)
    arrs = dict(idx=np.zeros(L, dtype=np.int64), cmap=np.zeros(nd, dtype=np.int64), msq=np.zeros(L),
                tv=np.zeros(L), dd=np.zeros(L), ee=np.zeros(L), gedge=np.zeros(L), ediag=np.zeros(L),
                comp_of=np.zeros(L, dtype=np.int64))
    n = _call_build(order, m.held.copy(), m.arrays, *arrs.values())
    lam, vec = np.zeros(L), np.zeros((L, L))
    k = _call_slow_modes(arrs["dd"], arrs["ee"], n, -500.0, arrs["gedge"], arrs["ediag"], arrs["msq"], arrs["comp_of"],
                       lam, vec)
    a = _jacobian(m, m.held.copy())[:nd, :nd]
    t = np.sqrt(m.capacity[:nd] * m.inv_partition[:nd])
    b = a * t[:, None] / t[None, :]
    w, v = np.linalg.eigh(0.5 * (b + b.T))
    want = w[w > -500.0][::-1]
    assert k == len(want)
    assert np.allclose(lam[:k], want, rtol=1e-9)
    for s in range(k):  # the same eigenvectors (up to sign), mapped back to state order
        q = np.zeros(nd)
        q[arrs["idx"][:n]] = vec[s, :n]
        vs = v[:, np.argmin(np.abs(w - lam[s]))]
        assert abs(abs(q @ vs) - 1.0) < 1e-9



def _stack_chain(rng: np.random.Generator) -> tuple[np.ndarray, ...]:
    """(dd, ee, gedge, ediag, msq) of a chain built as _build builds one: capacities, conductances
    and losses of copies of one stack (mirrored or repeated, joined by a link from 1e-16 to 1 of
    the others) or of layers 1e-6 to 1e6 apart, scaled as a whole by 1e-6 to 1e6 (invented)."""
    half = int(rng.choice([2, 5, 20, 80, 200]))
    uniform = rng.random() < 0.25
    cap_a = np.ones(half) if uniform else np.exp(rng.uniform(-3.0, 3.0, half))
    g_a = np.ones(half - 1) if uniform else np.exp(rng.uniform(-3.0, 3.0, half - 1))
    if rng.random() < 0.3:  # two layers far apart in capacity and conductance
        cut_at = half // 2
        cap_a[cut_at:] *= 10.0 ** rng.uniform(-6.0, 6.0)
        g_a[cut_at - 1:] *= 10.0 ** rng.uniform(-6.0, 6.0)
    e_a = np.zeros(half)
    e_a[0] = np.exp(rng.uniform(-8.0, 3.0))
    copies = int(rng.choice([1, 2, 3]))
    link = 10.0 ** rng.uniform(-16.0, 0.0)
    caps, gs, es = [cap_a], [g_a], [e_a]
    for c in range(1, copies):
        mirror = c % 2 == 1 and rng.random() < 0.7
        caps.append(cap_a[::-1] if mirror else cap_a)
        gs += [np.array([link]), g_a[::-1] if mirror else g_a]
        es.append(e_a[::-1] if mirror else e_a)
    cap, g, e = np.concatenate(caps), np.concatenate(gs), np.concatenate(es)
    if rng.random() < 0.2:
        e[:] = 0.0  # a closed chain: its equilibrium mode at 0
    scale = 10.0 ** rng.uniform(-6.0, 6.0)
    g, e = g * scale, e * scale
    n = cap.shape[0]
    msq = np.sqrt(cap)
    gsum = np.zeros(n)
    gsum[:-1] += g
    gsum[1:] += g
    dd = -(gsum + e) / cap
    ee = np.zeros(n)
    ee[:-1] = g / (msq[:-1] * msq[1:])
    gedge = np.zeros(n)
    gedge[:-1] = g
    return dd, ee, gedge, e, msq


def test_chain_modes_are_right_or_refused_on_clustered_and_scaled_chains():
    # The slow modes (Sturm counts, Newton's step, inverse iteration) against scipy.linalg.
    # eigh_tridiagonal (LAPACK stemr) on chains with near-equal eigenvalues (copies of one stack
    # weakly joined), layers 1e-6 to 1e6 apart and cuts on or near an eigenvalue: each call either
    # refuses (-1: the run goes to the robust integrator) or returns every eigenvalue above the cut
    # with an orthonormal basis of their eigenvectors. LAPACK's eigenvalues are accurate to about
    # 1e-16 of the largest, so they are compared to 1e-13 of it (and 1e-8 of their own size), and
    # the computed vectors must lie in the span of LAPACK's where the next eigenvalue is clear.
    from scipy.linalg import eigh_tridiagonal

    rng = np.random.default_rng(20261205)
    answered = 0
    for _case in range(150):
        dd, ee, gedge, ediag, msq = _stack_chain(rng)
        n = dd.shape[0]
        w, v = eigh_tridiagonal(dd, ee[:-1])
        w, v = w[::-1], v[:, ::-1]  # slowest first
        tnorm = float(np.max(np.abs(dd) + np.abs(ee) + np.abs(np.r_[0.0, ee[:-1]])))
        j = int(rng.integers(0, min(n, 64)))
        cut = min(w[j] * (1.0 + float(rng.choice([1e-12, 1e-6, 1e-3]))), -1e-300)
        want = int(np.sum(w > cut))
        if want > 64:
            continue
        lam, vec = np.zeros(n), np.zeros((65, n))
        k = _call_slow_modes(dd, ee, np.int64(n), cut, gedge, ediag, msq, np.zeros(n, dtype=np.int64), lam, vec)
        if k < 0:
            continue
        answered += 1
        if np.min(np.abs(w - cut)) > 1e-12 * tnorm:
            assert k == want
        q = vec[:k]
        assert np.max(np.abs(q @ q.T - np.eye(k)), initial=0.0) < 1e-6
        assert np.all(np.abs(lam[:k] - w[:k]) <= 1e-8 * np.abs(w[:k]) + 1e-13 * tnorm)
        if k and (k == n or w[k - 1] - w[k] > 1e-8 * tnorm):
            p = v[:, :k]
            assert np.max(np.linalg.norm(q - (q @ p) @ p.T, axis=1)) < 1e-6
    assert answered >= 30  # the sweep reaches the modes, not only their refusal

def test_phi_functions_near_zero():
    # phi1(x) = (e^x - 1)/x and phi2(x) = (e^x - 1 - x)/x^2 against their Taylor series
    # sum x^j / (j+1)! and sum x^j / (j+2)! (30 terms) where those converge fast, and math.expm1
    # beyond (where there is no cancellation)
    import math

    from barrierflow.engine.exact import phi1, phi2

    x = np.array([-1e-12, -1e-6, -0.05, -0.09999, -0.1, -0.5, -3.0, -50.0])
    small = np.abs(x) < 1
    want1 = np.array([sum(v**j / math.factorial(j + 1) for j in range(30)) if a else math.expm1(v) / v
                      for v, a in zip(x, small, strict=True)])
    want2 = np.array([sum(v**j / math.factorial(j + 2) for j in range(30)) if a else (math.expm1(v) - v) / v**2
                      for v, a in zip(x, small, strict=True)])
    assert np.allclose(phi1(x), want1, rtol=1e-14)
    assert np.allclose(phi2(x), want2, rtol=1e-13)



def test_rational_exponential_on_the_negative_axis():
    # the rational approximation of the chain path against numpy's exp, and its partial fractions
    # for phi1 = (e^x - 1)/x and phi2 = (e^x - 1 - x)/x^2 against exact.phi1 / phi2 (checked above
    # against their Taylor series), on x from -1e14 to 0
    from barrierflow.engine.exact import phi1, phi2
    from barrierflow.engine.exact_chain import RATIONAL_CONSTANT, RATIONAL_POLES, RATIONAL_RESIDUES

    x = -np.concatenate([np.logspace(-12, 14, 20001), [0.0]])
    terms = RATIONAL_RESIDUES[None, :] / (x[:, None] - RATIONAL_POLES[None, :])
    r = RATIONAL_CONSTANT + 2.0 * terms.real.sum(axis=1)
    assert np.max(np.abs(r - np.exp(x))) < 1e-13
    p1 = 2.0 * (terms / RATIONAL_POLES[None, :]).real.sum(axis=1)
    p2 = 2.0 * (terms / RATIONAL_POLES[None, :] ** 2).real.sum(axis=1)
    assert np.max(np.abs(p1 - phi1(x))) < 1e-13
    assert np.max(np.abs(p2 - phi2(x))) < 1e-12


@pytest.mark.parametrize("after", [1e-9, 1e-4, 2e-3])
def test_outputs_just_after_events_on_the_chain_path(after):
    # outputs 1e-9 h to 2e-3 h after a dose and after the end of a hold (the rational
    # approximation of the chain path; the modes serve the rest) against scipy Radau at rtol 1e-11
    # and the matrix exponentials of the augmented matrix (scipy.linalg.expm)
    s = patch_body(cells=20, hold=True)
    grid = np.arange(0.0, 72.0 + 1e-9, 0.5)
    times = np.union1d(grid, [24.0 + after, 11.0 + after, 24.0 + 3 * after, 48.0 + after])
    s = Scenario(name=s.name, duration=s.duration, output_times=tuple(times.tolist()), compartments=s.compartments,
                 barriers=s.barriers, exchanges=s.exchanges, doses=s.doses)
    ref = radau(s)
    chain = solve(s, ExactIntegrator("chain"), fallback=False)
    assert scaled_error(chain.states, ref.states, ref.model) < 1e-8
    expm = solve(s, ExactIntegrator("expm"), fallback=False)
    assert scaled_error(chain.states, expm.states, ref.model) < 1e-10
    r = bf.simulate(s)
    assert r.integrator == "exact" and r.mass_balance.relative_error < 1e-12


# ---------------------------------------------------------------- populations
def test_population_subjects_equal_single_runs():
    s = patch_body()
    var = {"barrier 'skin' layer 1 diffusivity": 0.3, "compartment 'central' clearance": 0.3,
           "exchange 'blood' flow": 0.2, "dose 1 concentration": 0.1}
    pop = simulate_population(s, var, 6, seed=11)
    subjects, factors = sample_scenarios(s, var, 6, seed=11)
    assert pop.integrator.startswith("exact")
    for i in (0, 3, 5):
        r = bf.simulate(subjects[i])
        # the same kernel compiled inside the parallel loop: equal up to rounding
        assert np.allclose(pop.concentration("central")[i], r.concentration("central"), rtol=1e-12, atol=1e-18)
        assert np.allclose(pop.permeated("skin")[i], r.permeated("skin"), rtol=1e-12, atol=1e-15)
        assert np.allclose(pop.flux("skin")[i], r.flux("skin"), rtol=1e-9, atol=1e-15)
        assert np.allclose(pop.eliminated("central")[i], r.eliminated("central"), rtol=1e-12)
    assert np.allclose(pop.factors["compartment 'central' clearance"], factors["compartment 'central' clearance"])
    rod = simulate_many(subjects, integrator=RosenbrockIntegrator(rtol=1e-8, atol=1e-11))
    c = pop.concentration("central")
    assert np.max(np.abs(rod.concentration("central") - c)) < 1e-6 * c.max()
    exposure = population_exposure(pop, "central")
    assert exposure.cmax.shape == (6,) and percentile_bands(pop.concentration("central")).shape == (3, len(pop.times))


def test_population_nonlinear_runs_rodas_and_matches():
    s = patch_body(saturable=True)
    pop = simulate_population(s, {"compartment 'central' vmax": 0.3}, 3, seed=2)
    assert pop.integrator.startswith("rodas4")
    subjects, _ = sample_scenarios(s, {"compartment 'central' vmax": 0.3}, 3, seed=2)
    r = bf.simulate(subjects[1], integrator=RosenbrockIntegrator())
    assert np.allclose(pop.concentration("central")[1], r.concentration("central"), rtol=1e-12, atol=1e-18)


def test_population_sampling_is_log_normal():
    # log-normal between-subject variability (Mould & Upton 2013): median = the scenario's value,
    # CV = cv; checked on 4000 draws (standard errors well inside the bounds below)
    s = patch_body()
    _, f = sample_scenarios(s, {"compartment 'central' volume": 0.3}, 4000, seed=1)
    x = f["compartment 'central' volume"]
    assert abs(np.median(x) - 1.0) < 0.03
    assert abs(np.std(x) / np.mean(x) - 0.3) < 0.02
    assert np.all(x > 0)


def test_population_refuses_bad_input():
    s = patch_body()
    with pytest.raises(ScenarioError, match="population variation: got \"barrier 'nope' area\""):
        simulate_population(s, {"barrier 'nope' area": 0.3}, 2)
    with pytest.raises(ScenarioError, match="coefficient of variation"):
        simulate_population(s, {"barrier 'skin' area": -1}, 2)
    with pytest.raises(ScenarioError, match="population size: got 0"):
        simulate_population(s, {}, 0)
    other = patch_body(cells=7)
    with pytest.raises(ScenarioError, match="population subject 2"):
        simulate_many([s, other])
    assert ParamPath.parse("barrier 'skin' layer 2 diffusivity") in parameter_paths(s, structural=False)


def test_population_varies_paths_by_the_contract_syntax_and_tied_groups():
    s = patch_body()
    dotted = {"barrier.skin.layer.1.diffusivity": 0.3, "compartment.central.clearance": 0.3}
    quoted = {"barrier 'skin' layer 1 diffusivity": 0.3, "compartment 'central' clearance": 0.3}
    a, fa = sample_scenarios(s, dotted, 5, seed=3)
    b, fb = sample_scenarios(s, quoted, 5, seed=3)
    assert a == b and list(fa) == list(dotted) and list(fb) == list(quoted)
    # a tied group: one factor for both members (layers 2 and 3 share their diffusivity)
    tied = {"barrier.skin.layer.2.diffusivity,barrier.skin.layer.3.diffusivity": 0.3}
    subjects, f = sample_scenarios(s, tied, 4, seed=5)
    for subject, factor in zip(subjects, f[next(iter(tied))], strict=True):
        d2, d3 = (layer.diffusivity for layer in subject.barrier("skin").layers[1:])
        assert d2 == d3 == s.barrier("skin").layers[1].diffusivity * factor
    # what a population may not vary, said plainly
    with pytest.raises(ScenarioError, match="shapes the run"):
        sample_scenarios(s, {"dose.1.every": 0.3}, 2)
    with pytest.raises(ScenarioError, match="is not a quantity"):
        sample_scenarios(s, {"barrier.skin.layer.1.cells": 0.3}, 2)
    with pytest.raises(ScenarioError, match="not set in the scenario"):
        sample_scenarios(s, {"compartment.central.km": 0.3}, 2)
    with pytest.raises(ScenarioError, match="did you mean 'barrier.skin.layer.1.diffusivity'"):
        sample_scenarios(s, {"barrier.skin.layer.1.difusivity": 0.3}, 2)


def test_population_exposure_uses_the_rules_of_a_single_run():
    # each subject's Cmax, tmax and AUC equal the metrics of the same scenario run alone: the
    # patch is refilled (replace doses), so its AUC needs the jump rule of a single run
    s = patch_body()
    var = {"barrier.skin.layer.1.diffusivity": 0.3, "compartment.patch.volume": 0.2}
    pop = simulate_population(s, var, 4, seed=7)
    subjects, _ = sample_scenarios(s, var, 4, seed=7)
    for cid in ("patch", "central"):
        exposure = population_exposure(pop, cid)
        for i, subject in enumerate(subjects):
            single = compute_metrics(bf.simulate(subject)).compartment(cid)
            assert exposure.auc[i] == pytest.approx(single.auc, rel=1e-9)
            assert exposure.cmax[i] == pytest.approx(single.cmax, rel=1e-9)
            assert exposure.tmax[i] == single.tmax


# ---------------------------------------------------------------- compiled code in pure Python
_PURE = textwrap.dedent("""
    import json, sys
    import numpy as np
    sys.path.insert(0, {tests!r})
    from test_engine_paths import patch_body, closed_cell
    from barrierflow.engine import solve
    from barrierflow.engine.exact import ExactIntegrator
    from barrierflow.engine.rosenbrock import RosenbrockIntegrator
    from barrierflow.engine.population import simulate_population
    from barrierflow.engine import exact_chain, population, rosenbrock
    for f in (rosenbrock.run_marks, exact_chain.chain_schedule, population._run_population):
        assert not hasattr(f, "signatures"), "numba is compiling: NUMBA_DISABLE_JIT did not take effect"
    out = {{}}
    s = patch_body(cells=2, hold=True)
    out["rodas"] = solve(s, RosenbrockIntegrator(rtol=1e-4, atol=1e-6)).states.tolist()
    out["chain"] = solve(s, ExactIntegrator("chain")).states.tolist()
    out["closed"] = solve(closed_cell(), ExactIntegrator("chain")).states.tolist()
    pop = simulate_population(s, {{"compartment 'central' clearance": 0.3}}, 2, seed=4)
    out["pop"] = pop.concentration("central").tolist()
    json.dump(out, sys.stdout)
""")


def test_compiled_kernels_also_run_as_plain_python():
    # NUMBA_DISABLE_JIT=1 runs the same kernels as Python; they must give the compiled results
    here = os.path.dirname(__file__)
    env = dict(os.environ, NUMBA_DISABLE_JIT="1")
    proc = subprocess.run([sys.executable, "-c", _PURE.format(tests=here)], capture_output=True, text=True, env=env,
                          timeout=900)
    assert proc.returncode == 0, proc.stderr[-2000:]
    pure = json.loads(proc.stdout)
    s = patch_body(cells=2, hold=True)
    assert np.allclose(pure["rodas"], solve(s, RosenbrockIntegrator(rtol=1e-4, atol=1e-6)).states, rtol=1e-10,
                       atol=1e-14)
    assert np.allclose(pure["chain"], solve(s, ExactIntegrator("chain")).states, rtol=1e-10, atol=1e-14)
    assert np.allclose(pure["closed"], solve(closed_cell(), ExactIntegrator("chain")).states, rtol=1e-10, atol=1e-14)
    pop = simulate_population(s, {"compartment 'central' clearance": 0.3}, 2, seed=4)
    assert np.allclose(pure["pop"], pop.concentration("central"), rtol=1e-10, atol=1e-16)


def test_independent_radau_on_the_benchmark_shape():
    # the patch-to-body network against a discretisation written here (scipy Radau, rtol 1e-10)
    n = 4
    s = patch_body(cells=n)
    area, k = 10.0, np.r_[np.full(n, 10.0), np.ones(2 * n)]
    w = np.r_[np.full(n, 15e-4 / n), np.full(n, 100e-4 / n), np.full(n, 1000e-4 / n)]
    d = np.r_[np.full(n, 1e-9 * H), np.full(2 * n, 1e-6 * H)]
    half = w / (2 * d * k)
    g_in, g, g_out = area / half[0], area / (half[:-1] + half[1:]), area / half[-1]

    def f(t, y):
        u = y[1:-2] / k
        j = np.r_[g_in * (y[0] - u[0]), g * (u[:-1] - u[1:]), g_out * (u[-1] - y[-2])]
        ex = 5000.0 * (y[-2] - y[-1])
        return np.r_[-j[0] / 1.0, (j[:-1] - j[1:]) / (area * w), (j[-1] - 10000.0 * y[-2] - ex) / 5000.0, ex / 20000.0]

    t_out = np.arange(0, 24.0, 0.5)
    y0 = np.zeros(3 * n + 3)
    y0[0] = 10.0
    ref = solve_ivp(f, (0, 24.0), y0, method="Radau", t_eval=t_out, rtol=1e-10, atol=1e-16).y
    for path in ("rodas", "exact-chain", "exact-modes"):
        r = bf.simulate(s, integrator=PATHS[path])
        got = r.concentration("central")[: len(t_out)]
        assert np.max(np.abs(got - ref[-2])) < 1e-5 * ref[-2].max(), path


def test_csv_text_equals_the_row_by_row_writer():
    # the compiled formatting of Result.csv_text gives the text of csv.writer with Python's own
    # format(x, ".12g") per value (an empty cell for NaN), the traces CSV contract
    import csv
    import io

    def _fmt(x):
        return "" if np.isnan(x) else format(float(x), ".12g")

    for s in (patch_body(), held_donor_degrading()):
        r = bf.simulate(s)
        cols = r.columns()
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow([name for name, _ in cols])
        for row in np.column_stack([v for _, v in cols]):
            w.writerow([_fmt(x) for x in row])
        assert r.csv_text() == buf.getvalue()


def test_rodas4_compartment_fed_by_many_barriers_keeps_its_accuracy():
    """A compartment fed by 64 barriers (about 1,300 states) on RODAS4's default tolerances: its
    concentration within 1e-5 of its peak (the benchmark contract's accuracy for the central
    concentration) against scipy's Radau (Hairer and Wanner 1996) at rtol 1e-10 on the same grid.

    The step's error is the larger of the root mean square over all states and the largest over
    the compartments: with the mean square alone one compartment's error is diluted by the
    thousands of cell states (this network: 1.2e-5 of the peak on the earlier norm).
    """
    s, c_ref = _star_of_64()
    c = bf.simulate(s, integrator=RosenbrockIntegrator()).concentration("central")
    assert np.max(np.abs(c - c_ref)) / np.max(c_ref) < 1e-5


@pytest.mark.parametrize("method", ["BDF", "Radau"])
def test_scipy_compartment_fed_by_many_barriers_keeps_its_accuracy(method):
    """The same compartment fed by 64 barriers on the scipy integrators' default tolerances (BDF,
    and Radau, which the default runs models with vehicle terms on): within 1e-5 of its peak
    against scipy's Radau at rtol 1e-10 (Hairer and Wanner 1996) on the same grid.

    scipy's error is the root mean square over all states; the compartments' tolerances are
    divided by sqrt(n) so that their error counts in full (``compartment_tolerances``). With
    scipy's norm alone BDF missed by 1.1e-5 of the peak here.
    """
    s, c_ref = _star_of_64()
    c = bf.simulate(s, integrator=ScipyIntegrator(method)).concentration("central")
    assert np.max(np.abs(c - c_ref)) / np.max(c_ref) < 1e-5


def test_scipy_that_keeps_its_tolerance_elsewhere_gets_every_state_as_tight(monkeypatch):
    """Should a scipy BDF not keep its relative tolerance as a float in ``rtol`` (where the
    integrator sets one per state), the integrator makes it again with every state as tight as
    the compartments: the star of 64 keeps its accuracy (and no tolerance is silently lost)."""
    import scipy.integrate

    class OtherBDF(scipy.integrate.BDF):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            self.made_with = kwargs["rtol"]
            self.rtol = np.asarray(self.rtol)  # not a float: left alone by the integrator
            made.append(self)

    made: list = []
    monkeypatch.setattr(scipy.integrate, "BDF", OtherBDF)
    s, c_ref = _star_of_64()
    c = bf.simulate(s, integrator=ScipyIntegrator("BDF")).concentration("central")
    assert np.max(np.abs(c - c_ref)) / np.max(c_ref) < 1e-5
    assert made and all(np.ndim(m.rtol) == 0 for m in made)
    assert min(m.made_with for m in made) < 1e-6 / 30  # made again: every state at 1e-6 / sqrt(n), n ~ 1,300


def test_compartment_tolerances_weigh_each_compartment_like_all_states():
    """The per-state tolerances that the scipy integrators get: a compartment's error at its own
    tolerance alone makes scipy's root mean square (scipy.integrate._ivp.common.norm) reach 1."""
    from scipy.integrate._ivp.common import norm

    from barrierflow.engine.integrators import compartment_tolerances

    n, nc = 1000, 3
    y = np.linspace(0.5, 2.0, n)
    atol, rtol = compartment_tolerances(np.full(n, 1e-9), 1e-6, nc)
    assert np.all(atol[nc:] == 1e-9) and np.all(rtol[nc:] == 1e-6)
    for c in range(nc):
        err = np.zeros(n)
        err[c] = 1e-9 + 1e-6 * y[c]  # the compartment's tolerance as given
        assert norm(err / (atol + rtol * np.abs(y))) == pytest.approx(1.0, rel=1e-12)
    # the cells alone as before: every cell at its tolerance gives 1
    err = np.r_[np.zeros(nc), 1e-9 + 1e-6 * y[nc:]]
    assert norm(err / (atol + rtol * np.abs(y))) == pytest.approx(np.sqrt((n - nc) / n), rel=1e-12)


@functools.cache
def _star_of_64():
    """The benchmark's invented star of 64 barriers (4 cells a layer) and its central
    concentration on scipy's Radau at rtol 1e-10 (made once for the tests that compare with it)."""
    from benchmarks.run_benchmark import star_toml

    s = bf.loads(star_toml(64, 4))
    ref = bf.simulate(s, integrator=ScipyIntegrator("Radau", rtol=1e-10, atol=1e-14))
    return s, ref.concentration("central")


@njit
def _call_numpy_sum(a, lo, n):
    return arrays.numpy_sum(a, lo, n)


def test_compiled_sum_is_numpys_sum_bit_for_bit():
    """arrays.numpy_sum against numpy's own sum (the reference library: its pairwise summation,
    numpy/_core/src/umath/loops_utils.h.src), bit for bit, on random arrays of every length up to
    600 and longer ones (ranges cut in two more than once), values over 20 decades and of both
    signs, and sums of negative zeros (numpy gives 0.0)."""
    rng = np.random.default_rng(7)
    for n in [*range(601), 1000, 1023, 1024, 1025, 4099, 20000]:
        for _ in range(3):
            a = rng.standard_normal(n + 4) * 10.0 ** rng.uniform(-10, 10, n + 4)
            lo = int(rng.integers(0, 5))
            want, got = a[lo:lo + n].sum(), _call_numpy_sum(a, lo, n)
            assert want == got and np.signbit(want) == np.signbit(got), (n, want, got)
        z = -np.zeros(n)
        assert not np.signbit(_call_numpy_sum(z, 0, n)) and not np.signbit(z.sum())


@pytest.mark.parametrize("cells", [3, 50, 200])
def test_present_amount_is_numpys(cells):
    """The ledger's initial amount (ledger.present_amount, compiled) equals the numpy expression it
    stands for, bit for bit (numpy as the reference library), on the benchmark's patch at 3, 50 and
    200 cells a layer and on a state of random values of both signs."""
    from barrierflow.engine.ledger import present_amount

    text = (Path(__file__).parent.parent / "scenarios" / "benchmark_patch.toml").read_text()
    model = compile_scenario(bf.loads(text.replace("cells = 50", f"cells = {cells}")))
    rng = np.random.default_rng(cells)
    for y in (model.y0, rng.standard_normal(model.n_state) * 10.0 ** rng.uniform(-8, 8, model.n_state)):
        nc, nd = model.n_comp, model.n_dyn
        amounts = y[:nd] * model.capacity[:nd]
        want = float(np.where(model.has_volume, amounts[:nc], 0.0).sum() + amounts[nc:].sum())
        assert present_amount(model, y) == want


@pytest.mark.parametrize("name", ["benchmark_patch.toml", "daily_patch.toml"])
def test_exact_checks_in_one_pass_equal_the_two_checks(name):
    """ledger.exact_rows_checks (one compiled pass, what solve takes for an exact run) gives, bit
    for bit, the ledger's relative error of rows_relative_error and the summary that
    check_magnitudes takes of the rows (signs only), on two shipped invented scenarios run on the
    exact path (two forms of one rule held equal: common practice)."""
    from barrierflow.engine.ledger import _magnitudes, exact_rows_checks, rows_relative_error

    s = bf.load(Path(__file__).parent.parent / "scenarios" / name)
    traj = solve(s, ExactIntegrator())
    m, rows = traj.model, traj.rows
    rel, signs = exact_rows_checks(m, rows, traj.event_dosed, traj.event_removed, traj.initial_amount)
    assert rel == rows_relative_error(m, rows, traj.event_dosed, traj.event_removed, traj.initial_amount)
    t = rows.taps
    want = _magnitudes(rows.cols, t.keep, t.bstart, t.bstop, m.capacity, m.has_volume, m.scale, m.n_comp, m.n_dyn,
                       m.q_elim, m.q_perm, m.q_lost, m.q_sampled, rows.content, np.ascontiguousarray(traj.event_dosed),
                       np.ascontiguousarray(traj.event_removed), float(traj.initial_amount), -1.0)
    assert np.array_equal(signs, want)
