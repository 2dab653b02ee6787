"""Populations built from arrays: one compile for many subjects, equal to each subject alone.

The reference of every check here is the subject's own scenario run alone (``with_values`` then
``compile_scenario`` or ``barrierflow.simulate``), whose own accuracy the reference tests check
against published solutions; the stacked path must give the same numbers (bit for bit where the
arithmetic is the same, to round-off where a sum is taken in another order).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import barrierflow as bf
from barrierflow.engine import arrays, compile_scenario
from barrierflow.engine.grid import Grid
from barrierflow.engine.ledger import ledger_rows, ledger_weights, relative_error_of
from barrierflow.engine.population import simulate_many, simulate_values
from barrierflow.errors import BarrierflowError, ScenarioError
from barrierflow.model.cohort import Diverging, refused, stacked
from barrierflow.model.paths import parameter_paths, with_values
from barrierflow.studies.runner import simulate_subjects

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"
ALL = sorted(p.name for p in SCENARIOS.glob("*.toml"))


def _draws(scenario, params, n, seed, spread=0.3):
    rng = np.random.default_rng(seed)
    base = np.array([p.get(scenario) for p in params], dtype=float)
    return base * np.exp(spread * rng.standard_normal((n, len(params))))


def _free_params(scenario):
    """Every value a population may vary, without the ones the model ties to others."""
    return [p for p in parameter_paths(scenario, structural=False) if p.numeric and p.kind != "count"
            and p.get(scenario)]


@pytest.mark.parametrize("name", ALL)
def test_stacked_compile_equals_each_subjects_own(name):
    # every non-structural value of the scenario varied at once: the stacked model's row i is
    # subject i's own compiled model, field by field, bit for bit (split where they diverge)
    s = bf.load(SCENARIOS / name)
    params = _free_params(s)
    values = _draws(s, params, 12, seed=3)
    bad = refused(s, params, values)
    keep = np.array([i for i in range(len(values)) if i not in bad])
    if not len(keep):
        pytest.skip("the model refuses every draw of this scenario")
    values = values[keep]
    try:
        model = compile_scenario(stacked(s, params, values), Grid())
        rows = range(len(values))
    except Diverging as split:
        rows = np.flatnonzero(split.mask)
        values = values[rows]
        model = compile_scenario(stacked(s, params, values), Grid())
        rows = range(len(values))
    for i in rows:
        own = compile_scenario(with_values(s, dict(zip(params, values[i].tolist(), strict=True))), Grid())
        for field in arrays.ModelArrays._fields:
            got, want = getattr(model.arrays, field), getattr(own.arrays, field)
            if isinstance(want, np.ndarray):
                got = got if field in arrays.SHARED else got[i]
                assert got.dtype == want.dtype and np.array_equal(got, want), (name, field, i)
            else:
                assert got == want, (name, field)


@pytest.mark.parametrize("name", ALL)
def test_refused_agrees_with_the_model(name):
    # values out of range (negative, zero, far too large) and ordinary ones: the subjects the
    # vectorised check refuses are exactly those with_values refuses, with its message
    s = bf.load(SCENARIOS / name)
    params = _free_params(s)
    rng = np.random.default_rng(11)
    values = _draws(s, params, 30, seed=4, spread=1.5)
    values[rng.random(values.shape) < 0.05] *= -1.0
    values[rng.random(values.shape) < 0.03] = 0.0
    values[rng.random(values.shape) < 0.03] *= 1e9
    bad = refused(s, params, values)
    for i, row in enumerate(values.tolist()):
        try:
            with_values(s, dict(zip(params, row, strict=True)))
            ok = True
        except BarrierflowError as err:
            ok = False
            assert bad.get(i) == " / ".join(str(err).splitlines())
        assert ok == (i not in bad), (name, i)


VARIED = ("barrier.skin.layer.1.diffusivity", "barrier.skin.layer.1.partition", "barrier.skin.layer.1.thickness",
          "barrier.skin.layer.2.diffusivity", "barrier.skin.layer.3.thickness", "barrier.skin.area",
          "compartment.central.volume", "compartment.central.clearance", "compartment.peripheral.volume",
          "exchange.exchange_1.flow")


@pytest.mark.parametrize("integrator", [None, "rodas"])
def test_subjects_from_values_equal_single_runs(integrator):
    # the benchmark patch with ten values varied: each subject of the stacked run equals its own
    # single run on the same path, and the run of the same subjects compiled one by one, bit for bit
    s = bf.load(SCENARIOS / "benchmark_patch.toml")
    params = [bf.model.paths.parse_param(p, s) for p in VARIED]
    values = _draws(s, params, 6, seed=8)
    engine = bf.engine.integrator_from_name(integrator) if integrator else None
    pop = simulate_values(s, params, values, integrator=engine)
    assert (pop.status == 0).all(), pop.messages
    subjects = [with_values(s, dict(zip(params, row, strict=True))) for row in values.tolist()]
    ref = simulate_many(subjects, integrator=engine)
    for name in ("_conc", "_quad", "_flux", "_content", "_dosed", "_removed", "_volume", "_area"):
        assert np.array_equal(getattr(pop, name), getattr(ref, name)), name
    for i in (0, 5):
        alone = bf.simulate(subjects[i], integrator=engine)
        for cid in ("patch", "central", "peripheral"):
            want = alone.concentration(cid)
            assert np.max(np.abs(pop.concentration(cid)[i] - want)) <= 1e-12 * np.max(np.abs(want)), cid
        want = alone.permeated("skin")
        assert np.max(np.abs(pop.permeated("skin")[i] - want)) <= 1e-12 * np.max(np.abs(want))


def test_diverging_structure_is_split_and_each_part_on_its_own_grid():
    # a degrading layer's default grid follows sqrt(D/k): subjects asking for different numbers
    # of cells run in separate parts, each on exactly the grid it gets alone
    s = bf.load(SCENARIOS / "daily_patch.toml")
    layer = "barrier.skin.layer.2"
    s = with_values(s, {f"{layer}.degradation_rate": 2.0})
    params = [bf.model.paths.parse_param(f"{layer}.degradation_rate", s)]
    values = np.array([[0.05], [1000.0], [2.0], [300.0], [1000.0]])  # 80, 122, 80, 78, 122 cells alone
    with pytest.raises(Diverging):
        compile_scenario(stacked(s, params, values), Grid())
    pop = simulate_values(s, params, values)
    assert (pop.status == 0).all(), pop.messages
    for i, row in enumerate(values.tolist()):
        alone = bf.simulate(with_values(s, {params[0]: row[0]}))
        want = alone.concentration("central")
        assert np.max(np.abs(pop.concentration("central")[i] - want)) <= 1e-12 * np.max(np.abs(want))


def test_runner_reports_refused_subjects_and_runs_the_rest():
    s = bf.load(SCENARIOS / "benchmark_patch.toml")
    params = [bf.model.paths.parse_param("compartment.central.clearance", s)]
    values = np.array([[2000.0], [-1.0], [3000.0]])
    pop, scenarios, messages = simulate_subjects(s, params, values)
    assert messages[0] == "" and messages[2] == ""
    assert messages[1].startswith("the model refused its values:") and "clearance" in messages[1]
    assert scenarios[1] is None and scenarios[0].compartment("central").clearance == 2000.0
    assert pop.n_subjects == 2 and (pop.status == 0).all()


def test_compiled_ledger_error_equals_the_ledger():
    # relative_error_of (the population kernel's ledger, row by row in compiled code) against
    # Ledger.relative_error of the same rows
    s = bf.load(SCENARIOS / "daily_patch.toml")
    tr = bf.engine.solve(s)
    m = tr.model
    nc, nd = m.n_comp, m.n_dyn
    cells = tr.states[:, nc:nd] @ m.capacity[nc:nd]
    present0 = float(np.where(m.has_volume, m.y0[:nc] * m.capacity[:nc], 0.0).sum()
                     + (m.y0[nc:nd] * m.capacity[nc:nd]).sum())
    for scale in (1.0, 1.0 + 1e-5):  # as computed, and with the amounts off by 1e-5
        quad = tr.states[:, nd:] * scale
        want = ledger_rows(m, tr.states[:, :nc], cells, quad, tr.event_dosed, tr.event_removed,
                           present0).relative_error
        got = _error_of(tr.states[:, :nc].copy(), cells, quad.copy(), tr.event_dosed, tr.event_removed, m,
                        ledger_weights(m))
        assert got == pytest.approx(want, rel=1e-9, abs=1e-15)


def _error_of(conc, cells, quad, dosed, removed, m, w):
    from numba import njit

    @njit
    def call(conc, cells, quad, dosed, removed, cap, hv, y0, nd, w):
        return relative_error_of(conc, cells, quad, dosed, removed, cap, hv, y0, nd, w)

    return call(conc, cells, quad, np.ascontiguousarray(dosed), np.ascontiguousarray(removed), m.capacity,
                m.has_volume, m.y0, m.n_dyn, w)


WITH_BARRIERS = [n for n in ALL if bf.load(SCENARIOS / n).barriers]


@pytest.mark.parametrize("name", WITH_BARRIERS)
def test_the_area_alone_varied_compiles_as_each_subjects_own(name):
    # only a barrier's area holds one value per subject (its cells are shared): the stacked
    # model's row i is subject i's own compiled model (with_values), field by field, bit for bit
    s = bf.load(SCENARIOS / name)
    for b in s.barriers:
        params = [bf.model.paths.parse_param(f"barrier.{b.id}.area", s)]
        values = b.area * np.array([[0.7], [1.0], [1.6]])
        assert not refused(s, params, values)
        model = compile_scenario(stacked(s, params, values), Grid())
        for i in range(len(values)):
            own = compile_scenario(with_values(s, {params[0]: values[i, 0]}), Grid())
            for field in arrays.ModelArrays._fields:
                got, want = getattr(model.arrays, field), getattr(own.arrays, field)
                if isinstance(want, np.ndarray):
                    got = got if field in arrays.SHARED else got[i]
                    assert got.dtype == want.dtype and np.array_equal(got, want), (name, b.id, field, i)
                else:
                    assert got == want, (name, field)


@pytest.mark.parametrize("name, varied", [("daily_patch.toml", "barrier.skin.area"),
                                          ("membrane_washoff.toml", "dose.1.fraction")])
def test_one_value_alone_varied_runs_as_each_subjects_single_run(name, varied):
    # the area alone (the patch's cells shared by every subject), and the share a wash-off
    # removes (one event value per subject, 1 for some: the whole content): each subject equals
    # its own single run (barrierflow.simulate of with_values) to 1e-12
    s = bf.load(SCENARIOS / name)
    if varied == "dose.1.fraction":
        s = with_values(s, {varied: 0.9})
    params = [bf.model.paths.parse_param(varied, s)]
    base = params[0].get(s)
    values = np.array([[0.5], [0.9], [1.0], [0.99]]) if varied == "dose.1.fraction" else base * np.array(
        [[0.6], [1.0], [1.7]])
    pop = simulate_values(s, params, values)
    assert (pop.status == 0).all(), pop.messages
    for i, row in enumerate(values.tolist()):
        alone = bf.simulate(with_values(s, {params[0]: row[0]}))
        for c in s.compartments:
            want = alone.concentration(c.id)
            assert np.max(np.abs(pop.concentration(c.id)[i] - want)) <= 1e-12 * np.max(np.abs(want)), (c.id, i)
        for b in s.barriers:
            want = alone.permeated(b.id)
            assert np.max(np.abs(pop.permeated(b.id)[i] - want)) <= 1e-12 * np.max(np.abs(want)), (b.id, i)


@pytest.mark.parametrize("varied, values", [("dose.2.fraction", [[0.9], [0.95]]),
                                            ("barrier.skin.area", [[0.8], [1.0]])])
def test_a_scenario_populations_do_not_run_is_refused_whatever_is_varied(varied, values):
    # the in-vitro protocol evaporates its vehicle: the compiled paths do not run it, and the
    # population says so (a ScenarioError naming the reason) before building any event from the
    # values, whichever value varies alone
    s = bf.load(SCENARIOS / "finite_dose_in_vitro.toml")
    params = [bf.model.paths.parse_param(varied, s)]
    with pytest.raises(ScenarioError, match="do not run evaporation"):
        simulate_subjects(s, params, np.array(values) * (s.barrier("skin").area if "area" in varied else 1.0))
