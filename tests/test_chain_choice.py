"""The default's choice between the exact chain path and RODAS4 on linear chain networks: on clear
cases, the path taken (not timed; the times are tests/benchmarks/chain_sweep.py's) and the result
against scipy's Radau integrator (Hairer and Wanner, Solving Ordinary Differential Equations II,
2nd ed., 1996, sec. IV.8; ``scipy.integrate.Radau``, the reference) at rtol 1e-10, each state's
largest deviation over its magnitude scale within ``SPLIT_TOL`` as in tests/test_split_choice.py.

The networks: the benchmark's patch (scenarios/benchmark_patch.toml, an invented scenario) at 10
cells a layer, where the chain path computes 19 modes and RODAS4 takes hundreds of steps; and
random network 19 of the property tests' generator made linear (as tests/benchmarks/chain_sweep.py
draws it, an invented scenario): a run of 0.6 h through layers whose slowest modes take thousands
of hours, so that about 290 modes have not decayed at its output times, more than the chain path
computes, and every row of its 34 goes through the rational approximation (9.2 ms at the last
measurement against RODAS4's 2.6 ms).
"""

from __future__ import annotations

import dataclasses
import random
import sys
from pathlib import Path

import numpy as np
from random_networks import random_scenario
from test_split_random import SPLIT_TOL, radau, scaled_error

import barrierflow as bf
from barrierflow.engine import compile_scenario, solve
from barrierflow.engine.exact import exact_plan, mode_time
from barrierflow.engine.exact_chain import MAX_MODES
from barrierflow.engine.integrators import (
    AutoIntegrator,
    chain_modes,
    chain_rescue,
    chain_rows,
    estimated_seconds,
    rational_cheaper,
)
from barrierflow.engine.schedule import build_schedule

sys.path.insert(0, str(Path(__file__).resolve().parent / "benchmarks"))
from run_benchmark import CELLS_800, NEAR_EVENT, Variant  # noqa: E402

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"


def patch(cells: int) -> bf.Scenario:
    """The benchmark's patch with ``cells`` cells a layer."""
    s = bf.load(SCENARIOS / "benchmark_patch.toml")
    return dataclasses.replace(s, barriers=tuple(
        dataclasses.replace(b, layers=tuple(dataclasses.replace(layer, cells=cells) for layer in b.layers))
        for b in s.barriers))


def short_run_through_slow_layers() -> bf.Scenario:
    """Random network 19 of the generator, linear (tests/benchmarks/chain_sweep.py)."""
    return random_scenario(random.Random(19), max_comp=4, small_grid=True, default_grid=True, max_barriers=2,
                           min_barriers=1, linear=True)


def chosen(s: bf.Scenario):
    tr = solve(s, fallback=False)
    assert tr.status == 0, tr.message
    return tr


def test_the_benchmark_patch_takes_the_chain_path_and_matches_radau():
    s = patch(10)
    m = compile_scenario(s)
    assert exact_plan(m)[0] == "chain"
    assert chain_modes(m, 60.0 / (1.0 / 6.0)) < MAX_MODES
    tr = chosen(s)
    assert tr.integrator == "exact"
    assert scaled_error(tr, radau(s)) < SPLIT_TOL


def test_many_modes_not_decayed_go_to_rodas4_and_match_radau():
    s = short_run_through_slow_layers()
    m = compile_scenario(s)
    assert exact_plan(m)[0] == "chain"
    times = s.output_array()
    marks = np.array(sorted({e.time for e in build_schedule(s, m.comp_index) if e.time < s.duration}
                            | {0.0, s.duration}))
    shortest = mode_time(times, marks)
    assert chain_modes(m, 60.0 / shortest) > 4 * MAX_MODES
    early = chain_rows(m, times, marks, shortest)
    assert early >= len(times) - 1  # every row after the start by the rational approximation
    assert (estimated_seconds("chain", m, len(times), len(marks) - 1, shortest=shortest, early=early)
            > 2.0 * estimated_seconds("rodas", m, len(times), len(marks) - 1))
    tr = chosen(s)
    assert tr.integrator == "rodas4"
    assert scaled_error(tr, radau(s)) < SPLIT_TOL


def test_the_benchmarks_chain_variants_keep_the_chain_path(tmp_path):
    # the chain path is 5 to 10 times faster than RODAS4 on each (tests/benchmarks/run_benchmark.py)
    f = tmp_path / "v.toml"
    for v in (Variant("50 cells", 50), Variant("20 cells", 20), Variant("200 cells", 200),
              Variant("finite dose 0.1 mL", patch_volume_ml=0.1), Variant(CELLS_800, (267, 267, 266)),
              Variant(NEAR_EVENT, 200, extra_times=(24.0 + 1e-4,))):
        f.write_text(v.toml())
        assert chosen(bf.load(f)).integrator == "exact", v.label



def test_small_quantities_on_a_chain_network_are_computed_again_and_meet_the_contract():
    """Random network 21 of the generator made linear (tests/benchmarks/chain_sweep.py, an invented
    scenario): the estimate puts RODAS4 first (344 states, 10 rows), whose result lets what barrier
    'b0' passed through its absolute tolerance (10.9 times the contract's promise on its peak,
    ledger.check_magnitudes). The remedy is the exact chain path (integrators.chain_rescue: its
    estimate below CHAIN_RESCUE times RODAS4's), which has no tolerances and whose ledger is held to
    exact.EXACT_BALANCE_LIMIT, not the robust integrator at scales from what the run reached (some
    ten times dearer); each exported column within the contract of scipy's Radau at rtol 1e-10
    (tests/test_small_columns.contract_errors), and every state within SPLIT_TOL of its scale."""
    from test_small_columns import contract_errors, reference

    s = random_scenario(random.Random(21), max_comp=4, small_grid=True, default_grid=True, max_barriers=2,
                        min_barriers=1, linear=True)
    assert solve(s, fallback=False).integrator == "rodas4"  # the estimate's choice
    m = compile_scenario(s)
    times = s.output_array()
    marks = np.array([0.0, s.duration])
    assert chain_rescue(m, len(times), 1, s.duration, mode_time(times, marks), times, marks) is not None
    res = bf.simulate(s)
    tr = res.trajectory
    assert tr.integrator == "exact" and tr.stats["fallbacks"] == 1, tr.message
    assert "far below the magnitude" in tr.message and "computed again with exact on the exact chain" in tr.message
    errors = contract_errors(res, reference(s, res))
    worst = max(errors, key=errors.get)
    assert errors[worst] <= 1.0, (worst, errors[worst])
    assert scaled_error(tr, radau(s)) < SPLIT_TOL


def test_a_chain_rescue_that_fails_its_check_goes_to_the_robust_integrator():
    """Random network 508 of the generator made linear (244 states, 12 rows, an invented scenario):
    RODAS4's result lets a small quantity through its tolerance, the exact chain path that
    integrators.chain_rescue sends it to fails its own check (its ledger off by 1.2e-9 of the amount
    moved, beyond exact.EXACT_BALANCE_LIMIT), and the run goes where RODAS4's
    finding sends it without that path: the robust integrator at scales from what the RODAS4 run
    reached; within the contract of scipy's Radau (meets_the_contract)."""
    s = linear_chain_network(508)
    assert solve(s, fallback=False, raise_on_failure=False).integrator == "rodas4"
    res = bf.simulate(s)
    tr = res.trajectory
    assert tr.integrator == "rodas4" and tr.stats["fallbacks"] == 2, tr.message
    assert "computed again with exact on the exact chain path" in tr.message
    assert "magnitudes the rodas4 run reached" in tr.message
    meets_the_contract(s, res)


def test_a_flux_rodas4_could_not_resolve_goes_to_the_chain_path():
    """Random network 257 of the generator made linear (252 states, 4 dosing intervals, 24 rows, an
    invented scenario): RODAS4's run is refused for the flux of barrier 'b0' (its step error
    estimates above FLUX_ESTIMATE_LIMIT times the flux's promise, rosenbrock.FLUX_FINDING); the
    default computes it again on the exact chain path (integrators.chain_rescue) rather than on the
    robust integrator, and the result is within the contract of scipy's Radau (meets_the_contract)."""
    s = linear_chain_network(257)
    first = solve(s, fallback=False, raise_on_failure=False)
    assert first.integrator == "rodas4" and first.status == -1 and "was not resolved" in first.message
    res = bf.simulate(s)
    tr = res.trajectory
    assert tr.integrator == "exact" and tr.stats["fallbacks"] == 1, tr.message
    assert "computed again with exact on the exact chain path" in tr.message
    meets_the_contract(s, res)


def linear_chain_network(i: int) -> bf.Scenario:
    """Random network ``i`` of the generator made linear, as tests/benchmarks/chain_sweep.py draws
    it (an invented scenario)."""
    return random_scenario(random.Random(i), max_comp=4, small_grid=True, default_grid=True, max_barriers=2,
                           min_barriers=1, linear=True)


def meets_the_contract(s: bf.Scenario, res: bf.Result) -> None:
    """Each exported column within the benchmark's contract of scipy's Radau IIA (Hairer and
    Wanner 1996, sec. IV.8) at rtol 1e-10 on the same grid (tests/test_small_columns.contract_errors),
    and every state within SPLIT_TOL of its scale."""
    from test_small_columns import contract_errors, reference

    errors = contract_errors(res, reference(s, res))
    worst = max(errors, key=errors.get)
    assert errors[worst] <= 1.0, (worst, errors[worst])
    assert scaled_error(res.trajectory, radau(s)) < SPLIT_TOL


def test_chain_modes_declined_go_to_the_chain_path_without_modes():
    """Random network 181 (144 states, 10 dosing intervals, 8 rows): the chain path the estimate
    chooses declines its modes (time scales too far apart to separate them); the default computes
    the run again on the chain path with every row through the rational approximation, which
    integrators.rational_cheaper estimates below RODAS4 (the robust integrator took 399 steps), and
    the result is exact within the contract."""
    s = linear_chain_network(181)
    first = solve(s, fallback=False, raise_on_failure=False)
    assert first.integrator == "exact" and first.status == -1 and "does not apply" in first.message
    res = bf.simulate(s)
    tr = res.trajectory
    assert tr.integrator == "exact" and tr.stats["fallbacks"] == 1, tr.message
    assert "rational approximation" in tr.message
    meets_the_contract(s, res)


def test_a_chain_result_that_fails_its_check_goes_to_the_chain_path_without_modes():
    """Random network 131 (184 states, 18 rows): the chain path's result has a face cell 1e-8 of
    its scale below zero (ledger.check_rows); the default computes the run again on the chain path
    with every row through the rational approximation (as a ledger beyond the exact limit), exact
    within the contract (before, on the robust integrator: 819 steps)."""
    s = linear_chain_network(131)
    first = solve(s, fallback=False, raise_on_failure=False)
    assert first.integrator == "exact" and first.status == -1 and "below zero" in first.message
    res = bf.simulate(s)
    tr = res.trajectory
    assert tr.integrator == "exact" and tr.stats["fallbacks"] == 1, tr.message
    assert "rational approximation" in tr.message
    meets_the_contract(s, res)


def test_a_declined_chain_path_goes_to_rodas4_at_the_default_tolerances_where_cheaper():
    """Random network 181 with output every 0.01 h (64 rows instead of 8): the chain path declines
    its modes as above, and integrators.rational_cheaper puts the rational rows above RODAS4's
    estimate, so the default computes the run on RODAS4 at its own tolerances (rtol 3e-6, atol
    3e-9 of the scales, AutoIntegrator's), checked the same way, not on the robust integrator (399
    steps at 8 rows)."""
    base = linear_chain_network(181)
    s = dataclasses.replace(base, output_step=0.01)
    m = compile_scenario(s)
    assert not rational_cheaper(m, len(s.output_array()), 10)
    first = solve(s, fallback=False, raise_on_failure=False)
    assert first.integrator == "exact" and first.status == -1 and "does not apply" in first.message
    res = bf.simulate(s)
    tr = res.trajectory
    assert tr.integrator == "rodas4" and tr.stats["fallbacks"] == 1, tr.message
    assert "at the default's tolerances" in tr.message
    auto = AutoIntegrator()
    assert (tr.integrator_options["rtol"], tr.integrator_options["atol"]) == (auto.rtol, auto.atol)
    meets_the_contract(s, res)
