"""What a run keeps at its rows (barrierflow.engine.exported) against its full states.

The compiled paths keep only the exported columns, the barriers' contents and the guard over
every state; the full states are computed again on request. The reference here is the same run's
full states (every state at every row, ``Trajectory.states``) put through the one rule
(``Rows.from_states``): the kept columns must be the same numbers, the contents and the guard the
same to 1e-13 of their size, on every shipped scenario, on every compiled path, and on random
networks (``tests/random_networks.py``, invented). A state made negative where no exported column
shows it must still fail the check (the guard reads every state).
"""

from __future__ import annotations

import random
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from random_networks import random_scenario

import barrierflow as bf
from barrierflow.engine import solve
from barrierflow.engine.exact import ExactIntegrator
from barrierflow.engine.exported import Rows, taps_of
from barrierflow.engine.integrators import RunPlan
from barrierflow.engine.ledger import NEGATIVE_LIMIT, check, check_rows, ledger, present_amount, rows_ledger
from barrierflow.engine.rosenbrock import RosenbrockIntegrator
from barrierflow.engine.schedule import build_schedule, encode_events

SCENARIOS = sorted((Path(__file__).parent.parent / "scenarios").glob("*.toml"))
REL = 1e-13


def same_rows(tr) -> None:
    """The kept rows of ``tr`` against its full states (computed again on request)."""
    m = tr.model
    ref = Rows.from_states(m, tr.states)
    got = tr.rows
    assert got.cols.shape == ref.cols.shape
    big = np.maximum(np.abs(ref.cols).max(axis=0, initial=0.0), 1e-300)
    assert np.all(np.abs(got.cols - ref.cols) <= REL * big), tr.integrator
    # a barrier's content against the larger of its largest value and its magnitude scale (the sum
    # of its cells' scales times their capacities, the yardstick of every error in the project):
    # RODAS4 forms the contents from the step's four vectors, whose rounding is relative to their
    # own size, which can exceed a nearly empty barrier's content
    m_scale = np.array([m.scale[g.start:g.stop] @ m.capacity[g.start:g.stop] for g in m.grids]).reshape(-1)
    for name in ("content", "clipped"):
        a, b = getattr(got, name), getattr(ref, name)
        size = np.maximum(np.maximum(np.abs(b).max(axis=0, initial=0.0), m_scale), 1e-300)
        assert np.all(np.abs(a - b) <= REL * size), (name, tr.integrator)
    scale_low = max(abs(ref.low), 1e-300)
    assert abs(got.low - ref.low) <= REL * scale_low
    assert abs(got.most_negative - ref.most_negative) <= REL * max(abs(ref.most_negative), 1e-300)
    assert got.finite == ref.finite
    # the ledger of the rows is the ledger of the states
    a = rows_ledger(m, got, tr.event_dosed, tr.event_removed, tr.initial_amount, tr.volumes)
    b = ledger(m, tr.states, tr.event_dosed, tr.event_removed, tr.initial_amount, tr.volumes)
    assert abs(a.relative_error - b.relative_error) <= 1e-12
    assert np.allclose(a.present, b.present, rtol=1e-13, atol=1e-13 * b.throughput)


@pytest.mark.parametrize("path", SCENARIOS, ids=lambda p: p.stem)
def test_kept_rows_equal_the_full_states_on_every_shipped_scenario(path):
    s = bf.load(path)
    for integrator in (None, RosenbrockIntegrator(), ExactIntegrator("chain")):
        try:
            tr = solve(s, integrator)
        except bf.ScenarioError:
            continue  # a path that does not run this network (vehicle terms, not a chain)
        same_rows(tr)
        result = bf.Result(s, tr)
        g = tr.model.grids
        for grid in g:
            # the traces' content: the cells clipped at 0, summed, as from the full states
            want = np.maximum(tr.states[:, grid.start:grid.stop], 0.0) @ tr.model.capacity[grid.start:grid.stop]
            assert np.allclose(result.content(grid.barrier_id), want, rtol=REL,
                               atol=REL * max(np.abs(want).max(initial=0.0), 1e-300))
            prof = result.profile(grid.barrier_id, float(result.times[-1]))
            assert np.array_equal(prof.conc, np.maximum(tr.states[-1, grid.start:grid.stop], 0.0))
        assert result.most_negative == float(min(0.0, np.min(tr.states[:, :tr.model.n_dyn], initial=0.0)))


@settings(max_examples=40, deadline=None, derandomize=True, database=None)
@given(st.randoms(use_true_random=False))
def test_kept_rows_equal_the_full_states_on_random_networks(rng: random.Random):
    s = random_scenario(rng, small_grid=True)
    for integrator in (None, RosenbrockIntegrator()):
        try:
            tr = solve(s, integrator, raise_on_failure=False)
        except bf.ScenarioError:
            continue
        if tr.status == 0:
            same_rows(tr)


def _corrupted(integrator, cell_offset: int):
    """A run of the benchmark's patch whose starting state has one inner cell of the barrier
    (not a face cell, so no exported column shows it) far below zero."""
    s = bf.load(Path(__file__).parent.parent / "scenarios" / "benchmark_patch.toml")
    tr = solve(s, integrator)  # the right run, for its model and plan
    m = tr.model
    g = m.grids[0]
    cell = g.start + cell_offset
    assert taps_of(m).pos[cell] < 0  # not a kept column
    y0 = m.y0.copy()
    y0[cell] = -1e-3 * m.scale[cell]
    bad = m.with_arrays(m.arrays._replace(y0=y0))
    events = [e for e in build_schedule(s, m.comp_index) if e.time < s.duration]
    marks = np.array(sorted({e.time for e in events} | {0.0, s.duration}))
    plan = RunPlan(bad, encode_events(events), marks, tr.times)
    return bad, plan, cell


@pytest.mark.parametrize("integrator", [RosenbrockIntegrator(), ExactIntegrator("chain")], ids=["rodas4", "chain"])
def test_a_negative_state_that_no_column_shows_still_fails_the_check(integrator):
    bad, plan, cell = _corrupted(integrator, 20)
    out = integrator.run(plan)
    rows = out.rows.finished(bad, out.last)
    full = integrator.run(RunPlan(plan.model, plan.events, plan.marks, plan.times, full=True)).states
    assert rows.low < -NEGATIVE_LIMIT
    # the guard is the lowest over every state, as from the full states
    want = float(np.min(full[:, :bad.n_dyn] / bad.scale[:bad.n_dyn]))
    assert rows.low == pytest.approx(want, rel=1e-13)
    initial = present_amount(bad, bad.y0)
    found = check_rows(bad, rows, out.event_dosed, out.event_removed, initial, None, lambda: full)
    assert any(f.startswith("a negative concentration") for f in found), found
    assert found == check(bad, full, out.event_dosed, out.event_removed, initial)


def test_a_corrupted_state_in_the_full_states_fails_the_rows_check():
    s = bf.load(Path(__file__).parent.parent / "scenarios" / "benchmark_patch.toml")
    tr = solve(s)
    m = tr.model
    states = tr.states.copy()
    cell = m.grids[0].start + 30
    states[500, cell] = -1e-6 * m.scale[cell]  # a state that no exported column shows
    rows = Rows.from_states(m, states)
    assert np.array_equal(rows.cols, tr.rows.cols)
    found = check_rows(m, rows, tr.event_dosed, tr.event_removed, tr.initial_amount, None, lambda: states)
    assert found and found[0].startswith("a negative concentration")
